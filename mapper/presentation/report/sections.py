"""The report's sections above and below the tests: summary, verdict, map, comparisons,
schedule, methods and cautions."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd

from mapper.presentation import charts
from mapper.presentation.report.page import Page, esc, num, table
from mapper.presentation.report.texts import CAUTIONS, METHOD_NOTES

QUALITY_ORDER = {"rejected": 0, "suspect": 1, "good": 2}


def summary_section(page: Page, campaign: Mapping[str, Any], params: pd.DataFrame | None) -> None:
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
        rows.append(("quality", ", ".join(f"{counts.get(q, 0)} {q}" for q in QUALITY_ORDER)))
        directions = params["direction"].value_counts()
        rows.append(("steps", f"{directions.get('up', 0)} up, {directions.get('down', 0)} down"))
        levels = pd.to_numeric(params["level"], errors="coerce").dropna()
        if len(levels):
            rows.append(("levels tested", f"{num(levels.min())} to {num(levels.max())} "
                                          f"{units.get('output', '')}".strip()))
    page.add('<section id="summary"><h2>Campaign summary</h2>')
    page.add(table(["item", "value"], [(k, v if isinstance(v, (int, float)) else str(v))
                                       for k, v in rows]))
    page.add("</section>")


def cautions_box() -> str:
    items = "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS)
    return (f'<div class="caution"><strong>Before using any tuning from this report</strong>'
            f"<ul>{items}</ul></div>")


def verdict_section(page: Page, verdict: Mapping[str, Any] | None) -> None:
    page.add('<section id="verdict"><h2>Verdict</h2>')
    if not verdict:
        page.add('<p class="muted">No verdict was given (too few usable tests).</p></section>')
        return
    decision = verdict.get("decision")
    text = {"single": "One controller serves the whole tested range.",
            "schedule": "A gain schedule is needed across the tested range.",
            "insufficient": "Not enough tests to judge: no controller or schedule is handed over."}.get(
        str(decision), f"Decision: {decision}")
    page.add(f'<p class="decision">{esc(text)}</p>')
    reasons = verdict.get("reasons") or []
    if reasons:
        page.add("<h3>Reasons</h3><ul>" + "".join(f"<li>{esc(r)}</li>" for r in reasons) + "</ul>")
    variation = verdict.get("variation") or {}
    if variation:
        page.add("<h3>Variation across the range</h3>")
        page.add(table(["parameter", "min", "max", "ratio", "significant"],
                       [(name, v.get("min"), v.get("max"), v.get("ratio"),
                         "yes" if v.get("significant") else "no") for name, v in variation.items()]))
    controller = verdict.get("controller") or {}
    if controller:
        page.add("<h3>Single controller</h3>")
        page.add(table(["setting", "value"], list(controller.items())))
    points = verdict.get("points") or []
    if points:
        header = ["level", "Ms", "gain margin", "phase margin (deg)", "IAE ratio (load step)", "peak ratio",
                  "setpoint overshoot"]
        page.add("<h3>Single controller at each tested level</h3>")
        page.add('<p class="muted">IAE and peak after a load step at the plant input, as ratios to a controller '
                 'tuned at that level (SIMC); Ms from the exact frequency response.</p>')
        page.add(table(header, [(p.get("level"), p.get("ms"), p.get("gain_margin"), p.get("phase_margin_deg"),
                                 p.get("iae_ratio", p.get("slowdown")), p.get("peak_ratio"), p.get("overshoot"))
                                for p in points]))
        applied = verdict.get("schedule_points") or []
        if applied and decision == "schedule":
            page.add("<h3>Schedule as applied at each tested level</h3>")
            page.add(table(["level", "kc", "ti"] + header[1:],
                           [(p.get("level"), p.get("kc"), p.get("ti"), p.get("ms"), p.get("gain_margin"),
                             p.get("phase_margin_deg"), p.get("iae_ratio"), p.get("peak_ratio"),
                             p.get("overshoot")) for p in applied]))
    page.add(cautions_box() + "</section>")


def map_section(page: Page, params: pd.DataFrame | None, trend: pd.DataFrame | None,
                map_summary: Sequence[Mapping[str, Any]] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="map"><h2>Operating map</h2>')
    if params is not None and len(params):
        page.chart("operating_map", charts.operating_map_chart(params, trend, units=units),
                   "Model parameters against operating level")
    if map_summary:
        page.add(table(["parameter", "shape", "min", "max", "ratio", "significant", "reason"],
                       [(m.get("parameter"), m.get("shape"), m.get("min"), m.get("max"),
                         m.get("ratio"), "yes" if m.get("significant") else "no", m.get("reason"))
                        for m in map_summary]))
    page.add("</section>")


def comparisons_section(page: Page, comparisons: Sequence[Mapping[str, Any]] | None) -> None:
    page.add('<section id="comparisons"><h2>Comparisons</h2>')
    if not comparisons:
        page.add('<p class="muted">No comparisons were made.</p>')
    groups: dict[str, list[str]] = {}
    for item in comparisons or []:
        groups.setdefault(str(item.get("kind", "other")), []).append(str(item.get("sentence", "")))
    for kind, sentences in groups.items():
        page.add(f"<h3>{esc(kind.replace('_', ' '))}</h3><ul>"
                 + "".join(f"<li>{esc(s)}</li>" for s in sentences) + "</ul>")
    page.add("</section>")


def schedule_section(page: Page, verdict: Mapping[str, Any] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="schedule"><h2>Schedule and tuning sheet</h2>')
    verdict = verdict or {}
    schedule = verdict.get("schedule") or []
    if schedule:
        first = ["level", "level_from", "level_to", "kc", "ti", "ti_min"]
        keys = [k for k in first if any(k in s for s in schedule)]
        keys += sorted({k for s in schedule for k in s} - set(keys))
        page.add(table(keys, [[s.get(k) for k in keys] for s in schedule]))
        page.chart("schedule", charts.schedule_chart(verdict, units=units),
                   "Controller gain against operating level")
    else:
        page.add('<p class="muted">No schedule: see the verdict.</p>')
    if verdict.get("points") or verdict.get("schedule_points"):
        page.chart("margins", charts.margins_chart(verdict, units=units),
                   "Maximum sensitivity across the tested levels")
    if verdict.get("responses"):
        page.chart("closed_loop", charts.closed_loop_chart(verdict, units=units),
                   "Simulated closed-loop responses (load step and setpoint step) at the lowest, middle and "
                   "highest tested levels: single controller against the schedule and the local tuning")
    page.add(cautions_box() + "</section>")


def methods_section(page: Page) -> None:
    page.add('<section id="methods"><h2>Methods and sources</h2><dl>')
    for name, text in METHOD_NOTES:
        page.add(f"<dt><strong>{esc(name)}</strong></dt><dd>{esc(text)}</dd>")
    page.add("</dl></section>")


def cautions_section(page: Page) -> None:
    page.add('<section id="cautions"><h2>Safety cautions</h2>' + cautions_box() + "</section>")
