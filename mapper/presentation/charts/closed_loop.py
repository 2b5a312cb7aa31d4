"""Chart of simulated closed-loop responses: single controller against schedule and local tuning."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, cast

import altair as alt

from mapper.presentation.charts.data import number, units_of
from mapper.presentation.charts.style import PALETTE, tips

CONTROLLERS = ["single", "schedule", "local"]


def _figures(verdict: Mapping[str, Any], level: float) -> str:
    """``single: IAE 1.3x, Ms 1.4; schedule: ...`` at one level (empty when not known)."""
    parts = []
    for name, key in (("single", "points"), ("schedule", "schedule_points")):
        if name == "schedule" and verdict.get("decision") != "schedule":
            continue
        for p in verdict.get(key) or []:
            if number(p.get("level")) is not None and abs(float(p["level"]) - level) <= 1e-9 * max(1.0, abs(level)):
                iae, ms = number(p.get("iae_ratio")), number(p.get("ms"))
                if iae is not None and ms is not None:
                    parts.append(f"{name}: IAE {iae:.2f}x, Ms {ms:.2f}")
    return "; ".join(parts)


def closed_loop_chart(verdict: Mapping[str, Any], *, units: Mapping[str, str] | None = None,
                      width: int = 210, height: int = 150) -> alt.FacetChart:
    """Simulated responses after a unit load step and a unit setpoint step at three levels.

    Parameters
    ----------
    verdict : mapping
        ``responses`` rows (level, step, controller, time, output) as made by
        :func:`mapper.analysis.responses.response_rows`, plus ``points``, ``schedule_points``,
        ``ms_max`` and ``slowdown_max`` for the figures and limits in the titles.
    units : mapping, optional
        ``{"input": ..., "output": ...}``; the level in the facet headers is in output units.

    Returns
    -------
    altair.FacetChart
        One panel per level (columns) and step (rows); the local tuning, the reference of the IAE
        ratio, drawn dotted.
    """
    _unit_in, unit_out = units_of(units)
    ms_max = number(verdict.get("ms_max")) or 2.0
    slowdown_max = number(verdict.get("slowdown_max")) or 2.0
    rows = []
    figures: dict[float, str] = {}  # one line per level, shared by that level's samples
    for r in verdict.get("responses") or []:
        level = float(r["level"])
        if level not in figures:
            figures[level] = _figures(verdict, level)
        step = "load step at the plant input" if r["step"] == "load" else "setpoint step"
        rows.append({**r, "panel": f"{level:.4g} {unit_out}".strip(), "step_name": step,
                     "figures": figures[level]})
    present = [c for c in CONTROLLERS if any(r["controller"] == c for r in rows)]
    colours = {"single": PALETTE["single"], "schedule": PALETTE["schedule"], "local": PALETTE["trend"]}
    dashes = {"single": [1, 0], "schedule": [6, 3], "local": [2, 2]}
    chart = alt.Chart({"values": rows}).mark_line(strokeWidth=1.6).encode(
        x=alt.X("time:Q", title="time after the step (s)"),
        y=alt.Y("output:Q", title="output per unit step"),
        color=alt.Color("controller:N", title="controller",
                        scale=alt.Scale(domain=present, range=[colours[c] for c in present])),
        strokeDash=alt.StrokeDash("controller:N", title="controller",
                                  scale=alt.Scale(domain=present, range=[dashes[c] for c in present])),
        tooltip=tips("controller:N", "time:Q", "output:Q", "figures:N"),
    ).properties(width=width, height=height)
    faceted = chart.facet(
        column=alt.Column("panel:N", title=f"operating level ({unit_out})", sort=None),
        row=alt.Row("step_name:N", title=None, sort=["load step at the plant input", "setpoint step"]),
    ).resolve_scale(x="independent", y="independent").properties(title=alt.TitleParams(
        "Simulated closed loop at the lowest, middle and highest tested levels",
        subtitle=[f"Limits: Ms <= {ms_max:g}; IAE after a load step <= {slowdown_max:g} times that of the "
                  f"locally tuned controller (dotted). Dead time simulated exactly."]))
    return cast(alt.FacetChart, faceted)
