"""vl-convert at the report's service: the JavaScript bundle and PNG copies of the charts.

The only module of the report that imports :mod:`vl_convert`.
"""

from __future__ import annotations

import functools
import re
from collections.abc import Iterable
from pathlib import Path
from typing import Any

import vl_convert

from mapper.errors import MapperError
from mapper.presentation.charts import VEGA_LITE_VERSION


def vl_version() -> str | None:
    """vl-convert's name for the Vega-Lite version altair writes, e.g. "6.4"."""
    match = re.match(r"v?(\d+)\.(\d+)", VEGA_LITE_VERSION)
    if not match:
        return None
    wanted = f"{match.group(1)}.{match.group(2)}"
    return wanted if wanted in vl_convert.get_vegalite_versions() else None


@functools.lru_cache(maxsize=2)
def javascript_bundle() -> str:
    """Vega, Vega-Lite and Vega-Embed as one script (cached; a few seconds the first time)."""
    # the stub marks ``snippet`` as required; at run time it defaults to the global names
    bundle = vl_convert.javascript_bundle(vl_version=vl_version())  # type: ignore[call-arg]
    # a literal "</script" would end the inline element early
    return re.sub(r"</(script)", r"<\\/\1", bundle, flags=re.IGNORECASE)


def png_folder(png_dir: str | Path) -> Path:
    """The PNG folder, created when missing."""
    folder = Path(png_dir)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MapperError(f"cannot create the PNG folder {folder}: {exc}",
                          hint="choose a writable folder with --png-dir") from exc
    return folder


def png_stem(name: str) -> str:
    """A plain file stem made from a chart name."""
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", name).lstrip(".") or "chart"


def write_png(folder: Path, name: str, spec: dict, scale: float = 1.0) -> Path:
    """Render one Vega-Lite specification to ``<folder>/<name>.png`` (no network)."""
    data = vl_convert.vegalite_to_png(spec, vl_version=vl_version(), scale=scale,
                                      allowed_base_urls=[])
    target = folder / f"{png_stem(name)}.png"
    target.write_bytes(data)
    return target


class PngWriter:
    """Writes the PNG copy of each chart as it is handed over."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.files: list[Path] = []

    def add(self, name: str, spec: dict) -> None:
        self.files.append(write_png(self.folder, name, spec))

    def finish(self) -> tuple[Path, ...]:
        return tuple(self.files)


def write_pngs(named_charts: Iterable[tuple[str, Any]], png_dir: str | Path,
               *, scale: float = 1.0) -> list[Path]:
    """Render charts to PNG files ``<png_dir>/<name>.png`` (vl-convert, no network).

    Parameters
    ----------
    named_charts : iterable of (str, chart)
        File stem and altair chart (or Vega-Lite dict); stems should be plain file names.
    png_dir : str or pathlib.Path
        Folder, created when missing.
    scale : float, default 1.0
        Pixel scale factor.

    Returns
    -------
    list of pathlib.Path
    """
    folder = png_folder(png_dir)
    return [write_png(folder, name, chart if isinstance(chart, dict) else chart.to_dict(validate=False),
                      scale) for name, chart in named_charts]
