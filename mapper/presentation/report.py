"""Self-contained HTML report of a campaign, and PNG copies of its charts.

Owns the report layout and the embedding of charts. The HTML file carries everything
inline: styles, the chart specifications and the Vega, Vega-Lite and Vega-Embed
JavaScript (bundled by vl-convert), so it opens on a machine with no network and can be
filed in a commissioning record as one file.

The page is streamed: written to a temporary file beside the target as it is made and
renamed at the end, with tests taken one at a time from any iterable, so a campaign of
thousands of tests needs no more memory than one of a few.

Safety of the page: every name and note that came from user files is escaped as text
(:func:`html.escape`), and chart specifications are embedded as JSON with ``<``, ``>``
and ``&`` written as ``\\u003c``, ``\\u003e``, ``\\u0026``, so a note cannot close the
script element or inject markup.
"""

from __future__ import annotations

import datetime as _dt
import functools
import html
import json
import math
import os
import re
import secrets
import shutil
import tempfile
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import pandas as pd
import vl_convert

from mapper.errors import MapperError
from mapper.presentation import charts

_QUALITY_ORDER = {"rejected": 0, "suspect": 1, "good": 2}

METHOD_NOTES: tuple[tuple[str, str], ...] = (
    ("Graphical 63.2 % method",
     "Gain is the change in output over the change in input; dead time runs from the input "
     "change to the first sustained output move; the time constant from there to 63.2 % of the "
     "change (common practice in the trade)."),
    ("Two-point method, 28.3 % / 63.2 %",
     "Smith, C. L. (1972), Digital Computer Process Control, Intext. Time constant and dead time "
     "from the times at which the response reaches two fractions of its change."),
    ("Two-point method, 35.3 % / 85.3 %",
     "Sundaresan, K. R. and Krishnaswamy, P. R. (1978), Estimation of time delay, time constant "
     "parameters in time, frequency and Laplace domains, Can. J. Chem. Eng. 56, 257-262. "
     "Coefficients are computed exactly from the two fractions rather than the rounded ones."),
    ("Area method",
     "Åström, K. J. and Hägglund, T. (1995), PID Controllers: Theory, Design and Tuning, 2nd ed., "
     "ISA. Integrals of the response only, hence robust to noise."),
    ("Least squares, output error (default)",
     "The model is driven by the measured input and its output compared with the measured "
     "output, so ramps and imperfect steps are handled; discretised exactly under a zero-order "
     "hold with fractional dead time. Intervals are 95 %, from the Jacobian at the optimum, "
     "widened for autocorrelated residuals (Ljung, L. (1999), System Identification, 2nd ed.)."),
    ("PI tuning, SIMC",
     "Skogestad, S. (2003), Simple analytic rules for model reduction and PID controller "
     "tuning, J. Process Control 13, 291-309: Kc = tau / (K (tau_c + theta)), "
     "Ti = min(tau, 4 (tau_c + theta))."),
    ("Loop margins",
     "Maximum sensitivity Ms, gain margin and phase margin from the exact frequency response "
     "including e^(-j w theta), not a Padé approximation; Ms limits of 1.2-2.0 are the usual "
     "range (Åström and Hägglund, 1995)."),
)

CAUTIONS: tuple[str, ...] = (
    "Agree every step size, operating limit and test window with operations before testing "
    "or applying tuning.",
    "Stay clear of alarm and trip limits; a step or a new controller must not drive the "
    "process towards them.",
    "Verify any tuning or schedule on the plant, carefully and under supervision, before "
    "relying on it; models from step tests are approximations with the uncertainty shown.",
    "Site procedures, management of change and licensed engineering practice take precedence "
    "over anything in this report.",
)

_STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:0 auto;
max-width:1100px;padding:1rem 1.5rem;color:#1a1a1a;line-height:1.45}
h1{font-size:1.6rem;margin-bottom:.2rem}h2{border-bottom:2px solid #d9d9d9;padding-bottom:.2rem;
margin-top:2.2rem}h3{margin-bottom:.3rem}
table{border-collapse:collapse;margin:.5rem 0 1rem;font-size:.9rem}
th,td{border:1px solid #d0d0d0;padding:.25rem .55rem;text-align:left;vertical-align:top}
th{background:#f2f2f2}td.num{text-align:right;font-variant-numeric:tabular-nums}
.caution{border-left:5px solid #C2185B;background:#fbf0f4;padding:.6rem 1rem;margin:1rem 0}
.decision{font-size:1.15rem;font-weight:600}
.test{border:1px solid #d9d9d9;border-radius:4px;padding:.6rem 1rem;margin:1rem 0}
.test.rejected{border-left:6px solid #A50026}.test.suspect{border-left:6px solid #8C6D1F}
.test.good{border-left:6px solid #B3B3B3}
.badge{display:inline-block;padding:0 .45rem;border-radius:3px;font-size:.85rem;color:#fff}
.badge.rejected{background:#A50026}.badge.suspect{background:#8C6D1F}
.badge.good{background:#6d6d6d}
.note{font-style:italic;white-space:pre-wrap}.muted{color:#666}
nav ul{columns:2;list-style:none;padding-left:0}
.chart{margin:.5rem 0;overflow-x:auto}
"""

# Runs before anything else: records uncaught script errors on the page itself.
_ERROR_HOOK = """
window.addEventListener('error',function(e){var r=document.documentElement;
var n=Number(r.getAttribute('data-script-errors')||'0')+1;r.setAttribute('data-script-errors',String(n));});
"""

# Draws the charts one after the other so the page stays responsive on long reports.
_RENDER = """
(function(){
var nodes=Array.prototype.slice.call(document.querySelectorAll('div.chart[data-spec]'));
var body=document.body,done=0,failed=0;
function mark(){body.setAttribute('data-charts-rendered',String(done));
body.setAttribute('data-charts-failed',String(failed));}
function draw(i){
 if(i>=nodes.length){mark();body.setAttribute('data-charts-complete','yes');return;}
 var node=nodes[i],spec;
 try{spec=JSON.parse(document.getElementById(node.getAttribute('data-spec')).textContent);}
 catch(err){failed++;node.textContent='Chart specification unreadable: '+err;console.error(err);draw(i+1);return;}
 vegaEmbed(node,spec,{renderer:'svg',actions:false}).then(function(){done++;},function(err){
  failed++;node.textContent='Chart could not be drawn: '+err;console.error(err);
 }).then(function(){mark();setTimeout(function(){draw(i+1);},0);});
}
draw(0);
})();
"""


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


def _vl_version() -> str | None:
    """vl-convert's name for the Vega-Lite version altair writes, e.g. "6.4"."""
    match = re.match(r"v?(\d+)\.(\d+)", charts.VEGA_LITE_VERSION)
    if not match:
        return None
    wanted = f"{match.group(1)}.{match.group(2)}"
    return wanted if wanted in vl_convert.get_vegalite_versions() else None


@functools.lru_cache(maxsize=2)
def javascript_bundle() -> str:
    """Vega, Vega-Lite and Vega-Embed as one script (cached; a few seconds the first time)."""
    # the stub marks ``snippet`` required; at run time it defaults to None (vl-convert 1.9)
    bundle = vl_convert.javascript_bundle(vl_version=_vl_version())  # type: ignore[call-arg]
    # a literal "</script" would end the inline element early
    return re.sub(r"</(script)", r"<\\/\1", bundle, flags=re.IGNORECASE)


def safe_json(spec: Any) -> str:
    """JSON text safe inside an HTML ``<script>`` element.

    ``<``, ``>`` and ``&`` (which JSON allows only inside strings) become unicode escapes,
    so no string can close the element or open a comment; JSON.parse restores them.
    """
    text = json.dumps(spec, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    for raw, escaped in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"),
                         ("\u2028", "\\u2028"), ("\u2029", "\\u2029")):
        text = text.replace(raw, escaped)
    return text


def _e(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def _num(value: Any, digits: int = 4) -> str:
    if value is None or isinstance(value, bool):
        return _e(value)
    try:
        x = float(value)
    except (TypeError, ValueError):
        return _e(value)
    if not math.isfinite(x):
        return "–"
    return f"{x:.{digits}g}"


def _table(headers: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = []
        for cell in row:
            numeric = isinstance(cell, (int, float)) and not isinstance(cell, bool)
            cells.append(f'<td class="num">{_num(cell)}</td>' if numeric else f"<td>{_e(cell)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


class _Page:
    """Writes HTML parts to a file as they come; a chart's PNG is written at once too.

    Nothing of a chart is kept after it is written, so the report of a long campaign
    needs no more memory than that of a short one.
    """

    def __init__(self, sink: IO[str], png_dir: Path | None = None) -> None:
        self.sink = sink
        self.png_dir = png_dir
        self.png_files: list[Path] = []
        self.n_charts = 0
        self._next_id = 0

    def add(self, text: str) -> None:
        self.sink.write(text)

    def reserve(self) -> str:
        """An element id for a chart that will be written later (ids follow page order)."""
        spec_id = f"spec-{self._next_id}"
        self._next_id += 1
        return spec_id

    def chart(self, name: str, chart: Any, label: str, *, spec_id: str | None = None) -> None:
        """Embed an altair chart or a Vega-Lite dict (and write its PNG with ``png_dir``)."""
        spec = chart if isinstance(chart, dict) else chart.to_dict(validate=False)
        self.embed(label, [safe_json(spec)], spec_id=spec_id)
        if self.png_dir is not None:
            self.png_files.append(_write_png(self.png_dir, name, spec))

    def embed(self, label: str, json_parts: Iterable[str], *, spec_id: str | None = None) -> None:
        """Write a chart's element and its specification, given as pieces of JSON text."""
        spec_id = spec_id or self.reserve()
        self.n_charts += 1
        self.add(f'<div class="chart" role="img" aria-label="{_e(label)}" data-spec="{spec_id}"></div>'
                 f'<script type="application/json" id="{spec_id}">')
        for part in json_parts:
            self.add(part)
        self.add("</script>")


def _flag_list(value: Any) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [value] if value else []
    return [str(v) for v in value]


def _summary_section(page: _Page, campaign: Mapping[str, Any], params: pd.DataFrame | None) -> None:
    units = campaign.get("units") or {}
    rows = [("campaign", campaign.get("name", "")),
            ("tests", campaign.get("n_tests", 0 if params is None else len(params))),
            ("input unit", units.get("input", "")), ("output unit", units.get("output", ""))]
    for key, value in campaign.items():
        if key not in ("name", "n_tests", "units"):
            shown = "; ".join(map(str, value)) if isinstance(value, (list, tuple)) else value
            rows.append((str(key), shown))
    if params is not None and len(params):
        counts = params["quality"].value_counts()
        rows.append(("quality", ", ".join(f"{counts.get(q, 0)} {q}" for q in _QUALITY_ORDER)))
        directions = params["direction"].value_counts()
        rows.append(("steps", f"{directions.get('up', 0)} up, {directions.get('down', 0)} down"))
        levels = pd.to_numeric(params["level"], errors="coerce").dropna()
        if len(levels):
            rows.append(("levels tested", f"{_num(levels.min())} to {_num(levels.max())} "
                                          f"{units.get('output', '')}".strip()))
    page.add('<section id="summary"><h2>Campaign summary</h2>')
    page.add(_table(["item", "value"], [(k, v if isinstance(v, (int, float)) else str(v))
                                        for k, v in rows]))
    page.add("</section>")


def _cautions_box() -> str:
    items = "".join(f"<li>{_e(c)}</li>" for c in CAUTIONS)
    return (f'<div class="caution"><strong>Before using any tuning from this report</strong>'
            f"<ul>{items}</ul></div>")


def _verdict_section(page: _Page, verdict: Mapping[str, Any] | None) -> None:
    page.add('<section id="verdict"><h2>Verdict</h2>')
    if not verdict:
        page.add('<p class="muted">No verdict was given (too few usable tests).</p></section>')
        return
    decision = verdict.get("decision")
    text = {"single": "One controller serves the whole tested range.",
            "schedule": "A gain schedule is needed across the tested range."}.get(
        str(decision), f"Decision: {decision}")
    page.add(f'<p class="decision">{_e(text)}</p>')
    reasons = verdict.get("reasons") or []
    if reasons:
        page.add("<h3>Reasons</h3><ul>" + "".join(f"<li>{_e(r)}</li>" for r in reasons) + "</ul>")
    variation = verdict.get("variation") or {}
    if variation:
        page.add("<h3>Variation across the range</h3>")
        page.add(_table(["parameter", "min", "max", "ratio", "significant"],
                        [(name, v.get("min"), v.get("max"), v.get("ratio"),
                          "yes" if v.get("significant") else "no") for name, v in variation.items()]))
    controller = verdict.get("controller") or {}
    if controller:
        page.add("<h3>Single controller</h3>")
        page.add(_table(["setting", "value"], list(controller.items())))
    points = verdict.get("points") or []
    if points:
        page.add("<h3>Single controller at each tested level</h3>")
        page.add(_table(["level", "Ms", "gain margin", "phase margin (deg)", "slowdown"],
                        [(p.get("level"), p.get("ms"), p.get("gain_margin"),
                          p.get("phase_margin_deg"), p.get("slowdown")) for p in points]))
    page.add(_cautions_box() + "</section>")


def _map_section(page: _Page, params: pd.DataFrame | None, trend: pd.DataFrame | None,
                 map_summary: Sequence[Mapping[str, Any]] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="map"><h2>Operating map</h2>')
    if params is not None and len(params):
        page.chart("operating_map", charts.operating_map_chart(params, trend, units=units),
                   "Model parameters against operating level")
    if map_summary:
        page.add(_table(["parameter", "shape", "min", "max", "ratio", "significant", "reason"],
                        [(m.get("parameter"), m.get("shape"), m.get("min"), m.get("max"),
                          m.get("ratio"), "yes" if m.get("significant") else "no", m.get("reason"))
                         for m in map_summary]))
    page.add("</section>")


def _comparisons_section(page: _Page, comparisons: Sequence[Mapping[str, Any]] | None) -> None:
    page.add('<section id="comparisons"><h2>Comparisons</h2>')
    if not comparisons:
        page.add('<p class="muted">No comparisons were made.</p>')
    groups: dict[str, list[str]] = {}
    for item in comparisons or []:
        groups.setdefault(str(item.get("kind", "other")), []).append(str(item.get("sentence", "")))
    for kind, sentences in groups.items():
        page.add(f"<h3>{_e(kind.replace('_', ' '))}</h3><ul>"
                 + "".join(f"<li>{_e(s)}</li>" for s in sentences) + "</ul>")
    page.add("</section>")


def _schedule_section(page: _Page, verdict: Mapping[str, Any] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="schedule"><h2>Schedule and tuning sheet</h2>')
    verdict = verdict or {}
    schedule = verdict.get("schedule") or []
    if schedule:
        first = ["level", "level_from", "level_to", "kc", "ti", "ti_min"]
        keys = [k for k in first if any(k in s for s in schedule)]
        keys += sorted({k for s in schedule for k in s} - set(keys))
        page.add(_table(keys, [[s.get(k) for k in keys] for s in schedule]))
        page.chart("schedule", charts.schedule_chart(verdict, units=units),
                   "Controller gain against operating level")
    else:
        page.add('<p class="muted">No schedule: see the verdict.</p>')
    if verdict.get("points") or verdict.get("schedule_points"):
        page.chart("margins", charts.margins_chart(verdict, units=units),
                   "Maximum sensitivity across the tested levels")
    page.add(_cautions_box() + "</section>")


def test_sort_key(row: Mapping[str, Any]) -> tuple:
    """Order of tests in the report: rejected, suspect, good, unjudged; then level, name.

    Callers that stream tests into :func:`write_report` sort their params rows with this.
    """
    raw: Any = row.get("level")  # None and text fall to the except below
    try:
        level = float(raw)
    except (TypeError, ValueError):
        level = math.inf
    return (_QUALITY_ORDER.get(str(row.get("quality")), 3), level if math.isfinite(level) else math.inf,
            str(row.get("test_id")))


def _test_card(page: _Page, index: int, item: tuple, units: Mapping[str, str]) -> None:
    row, t, u, y, fitted, step = item
    quality = str(row.get("quality") or "unjudged")
    css = quality if quality in _QUALITY_ORDER else ""
    page.add(f'<article class="test {css}" id="test-{index}"><h3>{_e(row.get("test_id"))} '
             f'<span class="badge {css}">{_e(quality)}</span></h3>')
    flags = _flag_list(row.get("flags"))
    facts = [f"level {_num(row.get('level'))} {units.get('output', '')}",
             f"{row.get('direction', '')} step of {_num(row.get('input_step'))} {units.get('input', '')}",
             f"model {row.get('model', '')}", f"file {row.get('file', '')}",
             f"NRMSE {_num(row.get('nrmse'))}"]
    page.add("<p>" + _e("; ".join(facts)) + "</p>")
    if flags:
        page.add("<p>Flags: " + _e(", ".join(flags)) + "</p>")
    if row.get("note"):
        page.add(f'<p class="note">Note: {_e(row.get("note"))}</p>')
    estimates = []
    for name, unit in (("gain", f"{units.get('output', '')}/{units.get('input', '')}"),
                       ("time_constant", "s"), ("dead_time", "s")):
        if row.get(name) is not None:
            estimates.append((name.replace("_", " "), row.get(name), row.get(f"{name}_lo"),
                              row.get(f"{name}_hi"), unit))
    if estimates:
        page.add(_table(["parameter", "estimate", "95 % low", "95 % high", "unit"], estimates))
    page.chart(f"test_{index:03d}_{re.sub(r'[^A-Za-z0-9_.-]+', '_', str(row.get('test_id')))[:60]}",
               charts.step_test_spec(row, t, u, y, fitted, step, units=units),
               f"Step response of test {row.get('test_id')}")
    page.add("</article>")


def _tests_section(page: _Page, items: Iterable[tuple], units: Mapping[str, str],
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
            _test_card(page, count, item, units)
    finally:
        page.sink = out
    page.add(f'<section id="tests"><h2>Every test ({count})</h2>'
             "<p>Rejected tests first, then suspect, then good. The overlay divides each "
             "response by its own change and counts time from the step, so odd tests stand out.</p>")
    if count:
        _overlay(page, series, overlay_id)
    spool.seek(0)
    shutil.copyfileobj(spool, out)
    page.add("</section>")


_ROWS_PLACEHOLDER = {"overlay_rows": "placeholder"}


def _overlay(page: _Page, series: Sequence[charts.OverlaySeries], spec_id: str,
             chunk: int = 2000) -> None:
    """Embed the overlay, writing its data rows in chunks rather than as one list."""
    spec = charts.overlay_chart_from_series(series, rows=[_ROWS_PLACEHOLDER]).to_dict(validate=False)
    head, marker, tail = safe_json(spec).partition(safe_json([_ROWS_PLACEHOLDER]))
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
    if page.png_dir is not None:
        full = charts.overlay_chart_from_series(series).to_dict(validate=False)
        page.png_files.append(_write_png(page.png_dir, "overlay", full))


def _methods_section(page: _Page) -> None:
    page.add('<section id="methods"><h2>Methods and sources</h2><dl>')
    for name, text in METHOD_NOTES:
        page.add(f"<dt><strong>{_e(name)}</strong></dt><dd>{_e(text)}</dd>")
    page.add("</dl></section>")


def _head(campaign: Mapping[str, Any]) -> str:
    title = f"{campaign.get('name', 'Campaign')}: step-test report"
    stamp = _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    toc = "".join(f'<li><a href="#{a}">{b}</a></li>' for a, b in (
        ("summary", "Campaign summary"), ("verdict", "Verdict"), ("map", "Operating map"),
        ("comparisons", "Comparisons"), ("schedule", "Schedule and tuning sheet"),
        ("tests", "Every test"), ("methods", "Methods and sources"), ("cautions", "Safety cautions")))
    return "".join([
        '<!DOCTYPE html><html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_STYLE}</style><script>{_ERROR_HOOK}</script></head><body>",
        f'<header><h1>{_e(title)}</h1><p class="muted">Written {_e(stamp)}. Times in seconds; '
        "intervals are 95 %.</p></header>",
        f"<nav><ul>{toc}</ul></nav>"])


def write_report(path: str | Path, *, campaign: Mapping[str, Any], params: pd.DataFrame | None,
                 trend: pd.DataFrame | None = None,
                 map_summary: Sequence[Mapping[str, Any]] | None = None,
                 verdict: Mapping[str, Any] | None = None,
                 comparisons: Sequence[Mapping[str, Any]] | None = None,
                 tests: Iterable[Any] = (), png_dir: str | Path | None = None) -> ReportInfo:
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
        ``name``, ``n_tests``, ``units`` (``{"input", "output"}``) and any further items
        (notes ...), shown in the summary.
    params : pandas.DataFrame or None
        Rows of the ``test_params`` view.
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
        When given, every chart is also written there as PNG, as soon as it is made.

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
    folder = None if png_dir is None else _png_folder(png_dir)
    part = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}.part")
    try:
        with open(part, "x", encoding="utf-8") as out, \
                tempfile.TemporaryFile("w+", encoding="utf-8", dir=path.parent) as spool:
            page = _Page(out, folder)
            page.add(_head(campaign))
            _summary_section(page, campaign, params)
            _verdict_section(page, verdict)
            _map_section(page, params, trend, map_summary, units)
            _comparisons_section(page, comparisons)
            _schedule_section(page, verdict, units)
            _tests_section(page, items, units, spool)
            _methods_section(page)
            page.add('<section id="cautions"><h2>Safety cautions</h2>' + _cautions_box() + "</section>")
            page.add(f"<script>{javascript_bundle()}</script><script>{_RENDER}</script></body></html>")
        os.replace(part, path)
    except OSError as exc:
        raise MapperError(f"cannot write the report to {path}: {exc}",
                          hint="check that the folder exists and is writable") from exc
    finally:
        part.unlink(missing_ok=True)
    return ReportInfo(path=path, size_bytes=path.stat().st_size, png_files=tuple(page.png_files),
                      n_charts=page.n_charts)


def _png_folder(png_dir: str | Path) -> Path:
    folder = Path(png_dir)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise MapperError(f"cannot create the PNG folder {folder}: {exc}",
                          hint="choose a writable folder with --png-dir") from exc
    return folder


def _write_png(folder: Path, name: str, spec: dict, scale: float = 1.0) -> Path:
    stem = re.sub(r"[^A-Za-z0-9_.-]+", "_", name).lstrip(".") or "chart"
    data = vl_convert.vegalite_to_png(spec, vl_version=_vl_version(), scale=scale,
                                      allowed_base_urls=[])
    target = folder / f"{stem}.png"
    target.write_bytes(data)
    return target


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
    folder = _png_folder(png_dir)
    return [_write_png(folder, name, chart if isinstance(chart, dict) else chart.to_dict(validate=False),
                       scale) for name, chart in named_charts]
