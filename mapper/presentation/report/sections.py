"""The report's sections above and below the tests: sign-off, summary, verdict, excluded
tests, map, comparisons, schedule, methods and cautions.

Every label is plain words (:mod:`.texts`): no field name, code or Python value reaches
the page.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any, cast

import pandas as pd

from mapper.presentation import charts
from mapper.presentation.report.comparisons import comparisons_section
from mapper.presentation.report.page import Page, esc, num, table
from mapper.presentation.report.texts import (
    CAUTIONS,
    DECISION_TEXT,
    METHOD_NOTES,
    PARAMETER_LABELS,
    SETTING_LABELS,
    label,
    value_text,
)

QUALITY_ORDER = {"rejected": 0, "suspect": 1, "good": 2}

__all__ = ["comparisons_section"]  # re-exported: one import for every section


def excluded_mask(params: pd.DataFrame | None) -> pd.Series:
    """True for tests an engineer excluded (``excluded`` column; none without it)."""
    if params is None or "excluded" not in params.columns:
        return pd.Series(False, index=[] if params is None else params.index, dtype=bool)
    return params["excluded"].fillna(False).astype(bool)


def exclusions(params: pd.DataFrame | None) -> dict[str, str]:
    """Test id (as text) to the reason it was excluded, for the excluded tests."""
    mask = excluded_mask(params)
    if params is None or not mask.any():
        return {}
    reasons = params["exclusion_reason"] if "exclusion_reason" in params.columns else None
    return {str(params.at[i, "test_id"]): ("" if reasons is None or pd.isna(reasons[i]) else str(reasons[i]))
            for i in params.index[mask]}


def used_tests(params: pd.DataFrame | None) -> pd.DataFrame | None:
    """The params rows without the excluded tests."""
    if params is None:
        return None
    return params[~excluded_mask(params)]


def record_section(page: Page, prepared_by: str | None, checked_by: str | None, date: str) -> None:
    """Who prepared and who checked the report, with room to sign on paper."""
    rows = []
    for role, name in (("Prepared by", prepared_by), ("Checked by", checked_by)):
        shown = (name or "").strip()
        filled = bool(shown)
        rows.append(f"<tr><th>{role}</th><td>{esc(shown)}</td><td></td>"
                    f"<td>{esc(date) if filled else ''}</td></tr>")
    page.add('<section id="record"><h2>Record</h2><table class="sign"><thead><tr><th>Role</th>'
             "<th>Name</th><th>Signature</th><th>Date</th></tr></thead><tbody>" + "".join(rows)
             + "</tbody></table><p class=\"muted\">Blank fields are for signing on paper.</p></section>")


def summary_section(page: Page, campaign: Mapping[str, Any], params: pd.DataFrame | None) -> None:
    units = campaign.get("units") or {}
    description = campaign.get("description") or ""
    rows: list[tuple[str, Any]] = [("Campaign", campaign.get("name", "")),
                                   ("Tests stored", campaign.get("n_tests", 0 if params is None else len(params)))]
    excluded = int(excluded_mask(params).sum())
    if excluded:
        rows.append(("Tests excluded by the engineer", excluded))
    rows += [("Input unit", units.get("input", "")), ("Output unit", units.get("output", ""))]
    used = used_tests(params)
    shown_counts = used is not None and len(used) > 0
    skipped = {"name", "n_tests", "units", "description"}
    if shown_counts:
        skipped |= {f"{q} tests" for q in QUALITY_ORDER}
    for key, value in campaign.items():
        if key in skipped or value is None or value == "":
            continue
        shown = "; ".join(map(str, value)) if isinstance(value, (list, tuple)) else value_text(value)
        rows.append((label("Remark" if key == "note" else key), shown))
    if used is not None and len(used):
        counts = used["quality"].value_counts()
        rows.append(("Quality of the tests used", ", ".join(f"{counts.get(q, 0)} {q}" for q in
                                                          ("good", "suspect", "rejected"))))
        directions = used["direction"].value_counts()
        rows.append(("Steps", f"{directions.get('up', 0)} up, {directions.get('down', 0)} down"))
        levels = pd.to_numeric(used["level"], errors="coerce").dropna()
        if len(levels):
            rows.append(("Levels tested", f"{num(levels.min())} to {num(levels.max())} "
                                          f"{units.get('output', '')}".strip()))
    page.add('<section id="summary"><h2>Campaign summary</h2>')
    if description:
        page.add(f'<p class="description">{esc(description)}</p>')
    page.add(table(["Item", "Value"], [(k, v if isinstance(v, (int, float)) else str(v))
                                       for k, v in rows]))
    page.add("</section>")


def cautions_box() -> str:
    items = "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS)
    return (f'<div class="caution"><strong>Before using any tuning from this report</strong>'
            f"<ul>{items}</ul></div>")


def _sentence(item: Any) -> str:
    if isinstance(item, Mapping):
        return str(item.get("text") or item.get("sentence") or item.get("message") or "")
    return str(item)


def settings_table(settings: Mapping[str, Any]) -> str:
    """A two-column table of a controller's settings, in plain words, empty ones left out."""
    known = [k for k in SETTING_LABELS if k in settings]
    keys = known + [k for k in settings if k not in SETTING_LABELS]
    rows = [(label(k), value_text(settings[k])) for k in keys
            if SETTING_LABELS.get(k, "") is not None and settings[k] not in (None, "")
            and not isinstance(settings[k], (dict, list))]
    return table(["Setting", "Value"], rows)


def _columns(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    keys = [k for k in SETTING_LABELS if SETTING_LABELS[k] is not None and any(k in r for r in rows)]
    extra = sorted({k for r in rows for k, v in r.items()
                    if k not in SETTING_LABELS and not isinstance(v, (dict, list))})
    return keys + extra


def rows_table(rows: Sequence[Mapping[str, Any]], keys: Sequence[str] | None = None) -> str:
    """A table of records with plain headers (known order first)."""
    keys = list(keys) if keys is not None else _columns(rows)
    return table([label(k) for k in keys], [[value_text(r.get(k)) for k in keys] for r in rows])


def verdict_section(page: Page, verdict: Mapping[str, Any] | None) -> None:
    page.add('<section id="verdict"><h2>Verdict</h2>')
    if not verdict:
        page.add('<p class="muted">No verdict was given (too few usable tests).</p></section>')
        return
    decision = str(verdict.get("decision"))
    text = DECISION_TEXT.get(decision, f"Decision: {label(decision)}.")
    page.add(f'<p class="decision">{esc(text)}</p>')
    reasons = [_sentence(r) for r in verdict.get("reasons") or []]
    if reasons:
        page.add("<h3>Reasons</h3><ul>" + "".join(f"<li>{esc(r)}</li>" for r in reasons if r) + "</ul>")
    to_add = verdict.get("levels_to_add") or []
    if to_add:
        page.add("<p>Levels to test next: " + esc(", ".join(num(v) for v in to_add)) + "</p>")
    variation = verdict.get("variation") or {}
    if variation:
        page.add("<h3>Variation across the range</h3>")
        page.add(table(["Parameter", "Lowest", "Highest", "Highest / lowest", "Significant"],
                       [(PARAMETER_LABELS.get(name, label(name)), v.get("min"), v.get("max"),
                         v.get("ratio"), bool(v.get("significant"))) for name, v in variation.items()]))
    controller = verdict.get("controller") or {}
    if controller:
        page.add("<h3>Best single controller</h3>" + settings_table(controller))
    points = verdict.get("points") or []
    if points:
        page.add("<h3>Single controller at each tested level</h3>")
        page.add('<p class="muted">IAE and peak after a load step at the plant input, as ratios to a controller '
                 'tuned at that level (SIMC); Ms from the exact frequency response.</p>')
        wanted = ["level", "ms", "gain_margin", "phase_margin_deg", "iae_ratio", "peak_ratio", "overshoot"]
        keys = [k for k in wanted if any(k in p for p in points)]
        if "iae_ratio" not in keys and any("slowdown" in p for p in points):
            keys.append("slowdown")
        page.add(rows_table(points, keys))
        applied = verdict.get("schedule_points") or []
        if applied and decision == "schedule":
            page.add("<h3>Schedule as applied at each tested level</h3>")
            page.add(rows_table(applied, [k for k in ["level", "kc", "ti", *keys[1:]]
                                          if any(k in p for p in applied)]))
    page.add(cautions_box() + "</section>")


def _window(row: Mapping[str, Any]) -> str:
    start, end = row.get("window_start"), row.get("window_end")
    if start is None or end is None or pd.isna(start) or pd.isna(end):
        return ""
    return f"{num(start)} to {num(end)} s"


def test_name(row: Mapping[str, Any]) -> str:
    """A test as a person finds it: its data file and, when known, its window."""
    file = str(row.get("file") or "") or f"test {row.get('test_id')}"
    window = _window(row)
    return f"{file}, {window}" if window else file


def excluded_section(page: Page, params: pd.DataFrame | None) -> None:
    page.add('<section id="excluded"><h2>Excluded tests</h2>')
    mask = excluded_mask(params)
    if params is None or not mask.any():
        page.add('<p class="muted">No test was excluded: every stored test was considered.</p></section>')
        return
    page.add("<p>Left out of the map, the comparisons and the verdict by the engineer; kept in the "
             "store and shown with the other tests below.</p>")
    rows = []
    extra = [k for k in ("excluded_by", "excluded_at") if k in params.columns]
    for rec in cast("list[dict[str, Any]]", params[mask].to_dict("records")):
        rows.append([test_name(rec), rec.get("level"), value_text(rec.get("direction")),
                     rec.get("exclusion_reason") or "", rec.get("note") or ""]
                    + [rec.get(k) for k in extra])
    page.add(table(["Test", "Level", "Step", "Reason", "Note"]
                   + [{"excluded_by": "Excluded by", "excluded_at": "When"}[k] for k in extra], rows))
    page.add("</section>")


def map_section(page: Page, params: pd.DataFrame | None, trend: pd.DataFrame | None,
                map_summary: Sequence[Mapping[str, Any]] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="map"><h2>Operating map</h2>')
    used = used_tests(params)
    if used is not None and len(used):
        page.chart("operating_map", charts.operating_map_chart(used, trend, units=units),
                   "Model parameters against operating level")
    if map_summary:
        page.add(table(["Parameter", "Shape", "Lowest", "Highest", "Highest / lowest", "Significant",
                        "Reason"],
                       [(PARAMETER_LABELS.get(str(m.get("parameter")), label(str(m.get("parameter")))),
                         value_text(m.get("shape")), m.get("min"), m.get("max"), m.get("ratio"),
                         bool(m.get("significant")), m.get("reason")) for m in map_summary]))
    page.add("</section>")


def schedule_section(page: Page, verdict: Mapping[str, Any] | None, units: Mapping[str, str]) -> None:
    page.add('<section id="schedule"><h2>Schedule and tuning sheet</h2>')
    verdict = verdict or {}
    schedule = verdict.get("schedule") or []
    if schedule:
        unit_in, unit_out = units.get("input") or "input units", units.get("output") or "output units"
        page.add(f'<p class="muted">Levels in {esc(unit_out)}; controller gain Kc in {esc(unit_in)} per '
                 f"{esc(unit_out)}.</p>")
        page.add(rows_table(schedule))
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
