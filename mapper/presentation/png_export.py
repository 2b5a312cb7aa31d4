"""PNG copies of charts, rendered in worker processes while the report is written.

vl-convert renders one chart in roughly a fifth of a second on one core, after a start-up
of about a second per process; a report of twenty charts therefore gains from a few
workers that render while the main process goes on writing the HTML. This module imports
nothing but vl-convert, so a worker started afresh (``spawn``: safe with the threads of
DuckDB and of vl-convert's own runtime in the parent) is ready quickly.
"""

from __future__ import annotations

import multiprocessing
import os
import re
from concurrent.futures import Future, ProcessPoolExecutor
from pathlib import Path

#: Most worker processes used for PNG export.
MAX_WORKERS = 4


def png_stem(name: str) -> str:
    """A plain file stem made from a chart name."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).lstrip(".") or "chart"


def render_png(spec: dict, target: str, vl_version: str | None, scale: float = 1.0) -> str:
    """Render one Vega-Lite specification to the PNG file ``target`` (no network).

    Returns
    -------
    str
        ``target``.
    """
    import vl_convert

    data = vl_convert.vegalite_to_png(spec, vl_version=vl_version, scale=scale, allowed_base_urls=[])
    Path(target).write_bytes(data)
    return target


def usable_cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


class PngExport:
    """Hands charts to worker processes as they come; :meth:`finish` waits for the files.

    With one core, or ``workers=1``, charts are rendered in this process as they come.
    File names follow the chart names (:func:`png_stem`); the list of files keeps the
    order in which the charts were added.

    Parameters
    ----------
    folder : pathlib.Path
        Existing folder the PNG files go to.
    vl_version : str or None
        Vega-Lite version for vl-convert.
    workers : int, optional
        Worker processes; by default one per usable core, at most :data:`MAX_WORKERS`.
    """

    def __init__(self, folder: Path, vl_version: str | None, *, workers: int | None = None,
                 scale: float = 1.0) -> None:
        self.folder = folder
        self.vl_version = vl_version
        self.scale = scale
        self.workers = max(1, min(MAX_WORKERS, usable_cores()) if workers is None else workers)
        self._pool: ProcessPoolExecutor | None = None
        self._pending: list[Future | str] = []

    def add(self, name: str, spec: dict) -> None:
        """Queue one chart (or render it now when working in this process)."""
        target = str(self.folder / f"{png_stem(name)}.png")
        if self.workers == 1:
            self._pending.append(render_png(spec, target, self.vl_version, self.scale))
            return
        if self._pool is None:
            self._pool = ProcessPoolExecutor(self.workers, mp_context=multiprocessing.get_context("spawn"))
        self._pending.append(self._pool.submit(render_png, spec, target, self.vl_version, self.scale))

    def finish(self) -> tuple[Path, ...]:
        """Wait for every queued chart; the files in the order added.

        Raises whatever a worker raised (after the others are done or cancelled).
        """
        try:
            return tuple(Path(p if isinstance(p, str) else p.result()) for p in self._pending)
        finally:
            self.close()

    def close(self) -> None:
        """Stop the workers, dropping charts not yet started."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None

    def __enter__(self) -> PngExport:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
