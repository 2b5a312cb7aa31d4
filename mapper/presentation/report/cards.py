"""The report's tests: the overlay of all of them, then one card per test."""

from __future__ import annotations

import math
import re
import shutil
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import PurePath
from typing import IO, Any

from mapper.errors import MapperError
from mapper.identification.flags import flag_text
from mapper.presentation import charts
from mapper.presentation.report.page import Page, esc, num, safe_json, table
from mapper.presentation.report.sections import QUALITY_ORDER, test_name
from mapper.presentation.report.texts import MODEL_LABELS, PARAMETER_LABELS, QUALITY_LABELS


def test_sort_key(row: Mapping[str, Any]) -> tuple:
    """Order of tests in the report: rejected, suspect, good, unjudged; then level, name.

    Callers that stream tests into :func:`write_report` sort their params rows with this.
    """
    try:
        level = float(row.get("level"))  # type: ignore[arg-type]  # None and text fall through
    except (TypeError, ValueError):
        level = math.inf
    return (QUALITY_ORDER.get(str(row.get("quality")), 3), level if math.isfinite(level) else math.inf,
            str(row.get("test_id")))


def _flag_list(value: Any) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [value] if value else []
    return [str(v) for v in value]


def _exclusion(row: Mapping[str, Any], excluded: Mapping[str, str]) -> str | None:
    """The reason a test was excluded ("" when none was given), or None when it was not."""
    key = str(row.get("test_id"))
    if key in excluded:
        return excluded[key]
    value = row.get("excluded")
    if bool(value) and value == value:  # NaN counts as not excluded
        return str(row.get("exclusion_reason") or "")
    return None


def png_name(row: Mapping[str, Any], taken: set[str]) -> str:
    """The PNG file stem of a test's chart: its data file's name, made unique in the report."""
    stem = PurePath(str(row.get("file") or "")).stem or f"test_{row.get('test_id')}"
    stem = re.sub(r"[^A-Za-z0-9_.-]+", "_", stem).strip("._")[:80] or "test"
    name = stem
    if name in taken or name in ("operating_map", "overlay", "schedule", "margins", "closed_loop"):
        start = row.get("window_start")
        name = f"{stem}_from_{num(start)}s" if start is not None and start == start else stem
        if name in taken:
            name = f"{stem}_test_{row.get('test_id')}"
    taken.add(name)
    return name


def test_card(page: Page, index: int, item: tuple, units: Mapping[str, str], taken: set[str],
              excluded_tests: Mapping[str, str]) -> None:
    row, t, u, y, fitted, step = item
    quality = str(row.get("quality") or "")
    shown_quality = QUALITY_LABELS.get(quality, quality)
    css = quality if quality in QUALITY_ORDER else ""
    reason = _exclusion(row, excluded_tests)
    excluded = reason is not None
    name = test_name(row)
    badge = f'<span class="badge {css}">{esc(shown_quality)}</span>'
    if excluded:
        badge += ' <span class="badge excluded">excluded</span>'
    page.add(f'<article class="test {css}" id="test-{index}"><h3>{esc(name)} {badge}</h3>')
    unit_in, unit_out = units.get("input", ""), units.get("output", "")
    model = str(row.get("model") or "")
    facts = [f"Level {num(row.get('level'))} {unit_out}".rstrip(),
             f"{row.get('direction') or ''} step of {num(row.get('input_step'))} {unit_in}".strip(),
             f"model: {MODEL_LABELS.get(model, model) or 'none fitted'}",
             f"fit error (NRMSE) {num(row.get('nrmse'))}", f"test number {row.get('test_id')}"]
    page.add('<p class="facts">' + esc("; ".join(facts)) + "</p>")
    if excluded:
        page.add(f'<p class="excluded">Excluded: {esc(reason or "no reason given")}</p>')
    flags = _flag_list(row.get("flags"))
    if flags:
        page.add('<p>Flags:</p><ul class="flags">'
                 + "".join(f"<li>{esc(flag_text(f))}</li>" for f in flags) + "</ul>")
    if row.get("note"):
        page.add(f'<p class="note">Note: {esc(row.get("note"))}</p>')
    estimates = []
    for key, unit in (("gain", f"{unit_out}/{unit_in}"), ("time_constant", "s"), ("dead_time", "s")):
        if row.get(key) is not None:
            estimates.append((PARAMETER_LABELS[key], row.get(key), row.get(f"{key}_lo"),
                              row.get(f"{key}_hi"), unit))
    if estimates:
        page.add(table(["Parameter", "Estimate", "95 % low", "95 % high", "Unit"], estimates))
    flag_words = ", ".join(f.replace("_", " ") for f in flags)
    subtitle = f"quality: {shown_quality}" + (f"; flags: {flag_words}" if flag_words else "")
    title = f"{name}: level {num(row.get('level'))} {unit_out}, {row.get('direction') or ''} step"
    page.chart(png_name(row, taken),
               charts.step_test_spec(row, t, u, y, fitted, step, units=units, title=title,
                                     subtitle=subtitle),
               f"Step response of {name}")
    page.add("</article>")


def tests_section(page: Page, items: Iterable[tuple], units: Mapping[str, str],
                  spool: IO[str], excluded_tests: Mapping[str, str] | None = None) -> None:
    """Every test, one at a time; the overlay of all of them goes above the cards.

    ``excluded_tests`` maps test ids (as text) to the reason they were excluded.

    The cards go to ``spool`` while the small overlay series are gathered; then the
    heading and the overlay are written and the cards copied after them.
    """
    out = page.sink
    overlay_id = page.reserve()
    series: list[charts.OverlaySeries] = []
    taken: set[str] = set()
    count = 0
    page.sink = spool
    try:
        for count, item in enumerate(items, start=1):
            found = charts.overlay_series(item)
            if found is not None:
                series.append(found)
            test_card(page, count, item, units, taken, excluded_tests or {})
    finally:
        page.sink = out
    page.add(f'<section id="tests"><h2>Every test ({count})</h2>'
             "<p>Rejected tests first, then suspect, then good; each titled by its data file. The "
             "overlay divides each response by its own change and counts time from the step, so odd "
             "tests stand out.</p>")
    if count:
        overlay(page, series, overlay_id)
    spool.seek(0)
    shutil.copyfileobj(spool, out)
    page.add("</section>")


ROWS_PLACEHOLDER = {"overlay_rows": "placeholder"}


def overlay(page: Page, series: Sequence[charts.OverlaySeries], spec_id: str,
            chunk: int = 2000) -> None:
    """Embed the overlay, writing its data rows in chunks rather than as one list."""
    spec = charts.overlay_chart_from_series(series, rows=[ROWS_PLACEHOLDER]).to_dict(validate=False)
    head, marker, tail = safe_json(spec).partition(safe_json([ROWS_PLACEHOLDER]))
    if not marker:
        raise MapperError("the overlay chart has an unexpected layout",
                          hint="report this as a bug in mapper")

    def parts() -> Iterator[str]:
        yield head + "["
        batch: list[dict] = []
        first = True
        for row in charts.overlay_rows(series):
            batch.append(row)
            if len(batch) == chunk:
                yield ("" if first else ",") + safe_json(batch)[1:-1]
                first, batch = False, []
        if batch:
            yield ("" if first else ",") + safe_json(batch)[1:-1]
        yield "]" + tail

    page.embed("All tests normalised on one plot", parts(), spec_id=spec_id)
    if page.pngs is not None:
        full = charts.overlay_chart_from_series(series).to_dict(validate=False)
        page.pngs.add("overlay", full)
