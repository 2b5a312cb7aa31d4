"""The whole report: head, sections in order, the JavaScript, written atomically."""

from __future__ import annotations

import datetime as _dt
import os
import secrets
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from mapper import __version__
from mapper.errors import MapperError
from mapper.presentation import charts
from mapper.presentation.report import sections
from mapper.presentation.report.cards import test_sort_key, tests_section
from mapper.presentation.report.page import Page, asset, esc
from mapper.presentation.report.vega import javascript_bundle, png_export


@dataclass(frozen=True)
class ReportInfo:
    """What :func:`write_report` wrote.

    Attributes
    ----------
    path : pathlib.Path
        The HTML file.
    size_bytes : int
        Its size in bytes.
    png_files : tuple of pathlib.Path
        PNG files written (empty without ``png_dir``).
    n_charts : int
        Charts embedded in the HTML.
    """

    path: Path
    size_bytes: int
    png_files: tuple[Path, ...]
    n_charts: int = 0


_CONTENTS = (
    ("record", "Record"), ("summary", "Campaign summary"), ("verdict", "Verdict"),
    ("excluded", "Excluded tests"), ("map", "Operating map"), ("comparisons", "Comparisons"),
    ("schedule", "Schedule and tuning sheet"), ("tests", "Every test"),
    ("methods", "Methods and sources"), ("cautions", "Safety cautions"))


def _head(campaign: Mapping[str, Any], stamp: str) -> str:
    title = f"{campaign.get('name', 'Campaign')}: step-test report"
    toc = "".join(f'<li><a href="#{a}">{b}</a></li>' for a, b in _CONTENTS)
    return "".join([
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(title)}</title><style>{asset('report.css')}</style>"
        f"<script>{asset('error_hook.js')}</script></head><body>",
        f'<header><h1>{esc(title)}</h1><p class="muted">Written {esc(stamp)} by mapper '
        f"{esc(__version__)}. Times in seconds; intervals are 95 %.</p></header>",
        f"<nav><ul>{toc}</ul></nav>"])


def write_report(path: str | Path, *, campaign: Mapping[str, Any], params: pd.DataFrame | None,
                 trend: pd.DataFrame | None = None,
                 map_summary: Sequence[Mapping[str, Any]] | None = None,
                 verdict: Mapping[str, Any] | None = None,
                 comparisons: Sequence[Mapping[str, Any]] | None = None,
                 tests: Iterable[Any] = (), png_dir: str | Path | None = None,
                 prepared_by: str | None = None, checked_by: str | None = None) -> ReportInfo:
    """Write the campaign report as one self-contained HTML file.

    The page is written piece by piece to a temporary file beside ``path`` and renamed
    to ``path`` when complete, so an error never leaves half a report, and tests are
    taken one at a time: memory does not grow with the number of tests beyond a small
    thinned series per test for the overlay.

    Parameters
    ----------
    path : str or pathlib.Path
        HTML file to write (its folder must exist).
    campaign : mapping
        ``name``, ``description``, ``n_tests``, ``units`` (``{"input", "output"}``) and any
        further items (a remark ...), shown in the summary with plain labels.
    params : pandas.DataFrame or None
        Rows of the ``test_params`` view. Rows with a true ``excluded`` column are listed
        with their ``exclusion_reason`` and left out of the map chart and the counts.
    trend : pandas.DataFrame or None
        ``parameter, level, value, lo, hi`` (trend and 95 % band), for the map.
    map_summary : sequence of mapping, optional
        One row per parameter: ``parameter, shape, min, max, ratio, significant, reason``.
    verdict : mapping, optional
        Shape of ``mapper verdict --format json``; may add ``schedule_points`` and ``ms_max``.
    comparisons : sequence of mapping, optional
        Each with ``sentence`` and ``kind``.
    tests : iterable
        Per test a dict (params row plus ``note, t, u, y, fitted, step_time``) or a tuple
        ``(row, t, u, y[, fitted[, step_time]])``. A list or tuple is shown rejected
        first, then suspect, then good (:func:`test_sort_key`); any other iterable (a
        generator reading the store, say) is taken in the order given, one test at a
        time, so sort it beforehand.
    png_dir : str or pathlib.Path, optional
        When given, every chart is also written there as PNG, by worker processes while
        the page is written (:mod:`mapper.presentation.png_export`); a test's chart is
        named after its data file.
    prepared_by, checked_by : str, optional
        Names for the record block; left blank to sign on paper.

    Returns
    -------
    ReportInfo

    Raises
    ------
    MapperError
        When the file or the PNG folder cannot be written.
    """
    path = Path(path)
    units = dict(campaign.get("units") or {})
    if isinstance(tests, (list, tuple)):
        items: Iterable[tuple] = sorted((charts.unpack_test(test) for test in tests),
                                        key=lambda item: test_sort_key(item[0]))
    else:
        items = (charts.unpack_test(test) for test in tests)
    pngs = None if png_dir is None else png_export(png_dir)
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    part = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.part")
    try:
        with open(part, "x", encoding="utf-8") as out, \
                tempfile.TemporaryFile("w+", encoding="utf-8", dir=path.parent) as spool:
            page = Page(out, pngs)
            page.add(_head(campaign, stamp))
            sections.record_section(page, prepared_by, checked_by, stamp[:10])
            sections.summary_section(page, campaign, params)
            sections.verdict_section(page, verdict)
            sections.excluded_section(page, params)
            sections.map_section(page, params, trend, map_summary, units)
            sections.comparisons_section(page, comparisons)
            sections.schedule_section(page, verdict, units)
            tests_section(page, items, units, spool, sections.exclusions(params))
            sections.methods_section(page)
            sections.cautions_section(page)
            page.add(f"<script>{javascript_bundle()}</script><script>{asset('render.js')}</script>"
                     "</body></html>")
        os.replace(part, path)
    except OSError as exc:
        if pngs is not None:
            pngs.close()
        raise MapperError(f"cannot write the report to {path}: {exc}",
                          hint="check that the folder exists and is writable") from exc
    except BaseException:
        if pngs is not None:
            pngs.close()
        raise
    finally:
        part.unlink(missing_ok=True)
    png_files: tuple[Path, ...] = ()
    if pngs is not None:
        try:
            png_files = pngs.finish()
        except OSError as exc:
            raise MapperError(f"cannot write the PNG charts to {png_dir}: {exc}",
                              hint="choose a writable folder with --png-dir") from exc
    return ReportInfo(path=path, size_bytes=path.stat().st_size, png_files=png_files,
                      n_charts=page.n_charts)
