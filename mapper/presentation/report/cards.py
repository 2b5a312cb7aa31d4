"""The report's tests: the overlay of all of them, then one card per test."""

from __future__ import annotations

import math
import re
import shutil
from collections.abc import Iterable, Iterator, Mapping, Sequence
from typing import IO, Any

from mapper.errors import MapperError
from mapper.presentation import charts
from mapper.presentation.report.page import Page, esc, num, safe_json, table
from mapper.presentation.report.sections import QUALITY_ORDER


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


def test_card(page: Page, index: int, item: tuple, units: Mapping[str, str]) -> None:
    row, t, u, y, fitted, step = item
    quality = str(row.get("quality") or "unjudged")
    css = quality if quality in QUALITY_ORDER else ""
    page.add(f'<article class="test {css}" id="test-{index}"><h3>{esc(row.get("test_id"))} '
             f'<span class="badge {css}">{esc(quality)}</span></h3>')
    flags = _flag_list(row.get("flags"))
    facts = [f"level {num(row.get('level'))} {units.get('output', '')}",
             f"{row.get('direction', '')} step of {num(row.get('input_step'))} {units.get('input', '')}",
             f"model {row.get('model', '')}", f"file {row.get('file', '')}",
             f"NRMSE {num(row.get('nrmse'))}"]
    page.add("<p>" + esc("; ".join(facts)) + "</p>")
    if flags:
        page.add("<p>Flags: " + esc(", ".join(flags)) + "</p>")
    if row.get("note"):
        page.add(f'<p class="note">Note: {esc(row.get("note"))}</p>')
    estimates = []
    for name, unit in (("gain", f"{units.get('output', '')}/{units.get('input', '')}"),
                       ("time_constant", "s"), ("dead_time", "s")):
        if row.get(name) is not None:
            estimates.append((name.replace("_", " "), row.get(name), row.get(f"{name}_lo"),
                              row.get(f"{name}_hi"), unit))
    if estimates:
        page.add(table(["parameter", "estimate", "95 % low", "95 % high", "unit"], estimates))
    page.chart(f"test_{index:03d}_{re.sub(r'[^A-Za-z0-9_.-]+', '_', str(row.get('test_id')))[:60]}",
               charts.step_test_spec(row, t, u, y, fitted, step, units=units),
               f"Step response of test {row.get('test_id')}")
    page.add("</article>")


def tests_section(page: Page, items: Iterable[tuple], units: Mapping[str, str],
                  spool: IO[str]) -> None:
    """Every test, one at a time; the overlay of all of them goes above the cards.

    The cards go to ``spool`` while the small overlay series are gathered; then the
    heading and the overlay are written and the cards copied after them.
    """
    out = page.sink
    overlay_id = page.reserve()
    series: list[charts.OverlaySeries] = []
    count = 0
    page.sink = spool
    try:
        for count, item in enumerate(items, start=1):
            found = charts.overlay_series(item)
            if found is not None:
                series.append(found)
            test_card(page, count, item, units)
    finally:
        page.sink = out
    page.add(f'<section id="tests"><h2>Every test ({count})</h2>'
             "<p>Rejected tests first, then suspect, then good. The overlay divides each "
             "response by its own change and counts time from the step, so odd tests stand out.</p>")
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
