"""vl-convert at the report's service: the JavaScript bundle (cached on disk) and PNG export.

The JavaScript bundle (Vega, Vega-Lite and Vega-Embed, about 0.9 MB) takes vl-convert a
second or more to build. It depends only on the vl-convert release and the Vega-Lite
version, so it is built once and kept in the user's cache folder, under a name that
carries both; later reports read it from there.
"""

from __future__ import annotations

import contextlib
import functools
import os
import re
import sys
from collections.abc import Iterable
from importlib import metadata
from pathlib import Path
from typing import Any

import vl_convert

from mapper.errors import MapperError
from mapper.presentation.charts import VEGA_LITE_VERSION
from mapper.presentation.png_export import PngExport

#: Environment variable that moves the cache folder (an empty value turns the cache off).
CACHE_ENV = "MAPPER_CACHE_DIR"

#: Changes when the way the bundle is stored changes, so old files are not read.
_BUNDLE_FORMAT = "1"


def vl_version() -> str | None:
    """vl-convert's name for the Vega-Lite version altair writes, e.g. "6.4"."""
    match = re.match(r"v?(\d+)\.(\d+)", VEGA_LITE_VERSION)
    if not match:
        return None
    wanted = f"{match.group(1)}.{match.group(2)}"
    return wanted if wanted in vl_convert.get_vegalite_versions() else None


def cache_folder() -> Path | None:
    """The folder for cached files: ``$MAPPER_CACHE_DIR``, else the platform's user cache.

    Linux and others: ``$XDG_CACHE_HOME/mapper`` or ``~/.cache/mapper`` (XDG Base
    Directory Specification); macOS: ``~/Library/Caches/mapper``; Windows:
    ``%LOCALAPPDATA%\\mapper\\Cache``. None when ``MAPPER_CACHE_DIR`` is set but empty.
    """
    chosen = os.environ.get(CACHE_ENV)
    if chosen is not None:
        return Path(chosen) if chosen.strip() else None
    if sys.platform == "win32" and os.environ.get("LOCALAPPDATA"):
        return Path(os.environ["LOCALAPPDATA"]) / "mapper" / "Cache"
    if sys.platform == "darwin":
        return Path.home() / "Library" / "Caches" / "mapper"
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "mapper"


def bundle_cache_file() -> Path | None:
    """Where the bundle for this vl-convert release and Vega-Lite version is kept."""
    folder = cache_folder()
    if folder is None:
        return None
    try:
        release = metadata.version("vl-convert-python")
    except metadata.PackageNotFoundError:
        release = "unknown"
    key = f"{release}-vl{vl_version() or 'default'}-f{_BUNDLE_FORMAT}"
    return folder / f"vega-bundle-{re.sub(r'[^A-Za-z0-9_.-]+', '_', key)}.js"


def _read_cached(path: Path | None) -> str | None:
    if path is None:
        return None
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError):
        return None
    # written whole by rename, so a file is complete or absent; still, check its ends
    return text if "vegaEmbed" in text and text.endswith("\n") else None


def _store_cached(path: Path | None, text: str) -> None:
    """Keep the bundle for later runs; a cache that cannot be written is simply skipped."""
    if path is None:
        return
    part = path.with_name(f".{path.name}.{os.getpid()}.part")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        part.write_text(text, encoding="utf-8")
        os.replace(part, path)
    except OSError:
        with contextlib.suppress(OSError):
            part.unlink(missing_ok=True)


@functools.lru_cache(maxsize=2)
def javascript_bundle() -> str:
    """Vega, Vega-Lite and Vega-Embed as one script, safe inside a ``<script>`` element.

    Read from the cache folder (:func:`bundle_cache_file`) when there; otherwise built by
    vl-convert (a second or more) and stored there for the next run.
    """
    path = bundle_cache_file()
    cached = _read_cached(path)
    if cached is not None:
        return cached
    # the stub marks ``snippet`` as required; at run time it defaults to the global names
    bundle = vl_convert.javascript_bundle(vl_version=vl_version())  # type: ignore[call-arg]
    # a literal "</script" would end the inline element early
    text = re.sub(r"</(script)", r"<\\/\1", bundle, flags=re.IGNORECASE).rstrip("\n") + "\n"
    _store_cached(path, text)
    return text


def png_folder(png_dir: str | Path) -> Path:
    """The PNG folder, created when missing."""
    folder = Path(png_dir)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MapperError(f"cannot create the PNG folder {folder}: {exc}",
                          hint="choose a writable folder with --png-dir") from exc
    return folder


def png_export(png_dir: str | Path, *, workers: int | None = None, scale: float = 1.0) -> PngExport:
    """A :class:`~mapper.presentation.png_export.PngExport` into ``png_dir`` (created)."""
    return PngExport(png_folder(png_dir), vl_version(), workers=workers, scale=scale)


def write_pngs(named_charts: Iterable[tuple[str, Any]], png_dir: str | Path,
               *, scale: float = 1.0, workers: int | None = None) -> list[Path]:
    """Render charts to PNG files ``<png_dir>/<name>.png`` (vl-convert, no network).

    Parameters
    ----------
    named_charts : iterable of (str, chart)
        File stem and altair chart (or Vega-Lite dict); stems should be plain file names.
    png_dir : str or pathlib.Path
        Folder, created when missing.
    scale : float, default 1.0
        Pixel scale factor.
    workers : int, optional
        Worker processes (default: one per core, at most four; 1 renders here).

    Returns
    -------
    list of pathlib.Path
    """
    with png_export(png_dir, workers=workers, scale=scale) as export:
        for name, chart in named_charts:
            export.add(name, chart if isinstance(chart, dict) else chart.to_dict(validate=False))
        return list(export.finish())
