"""Charts of the verdict: robustness (Ms) across levels and the gain schedule."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, cast

import altair as alt

from mapper.presentation.charts.data import (
    margins_rows,
    number,
    schedule_is_interpolated,
    schedule_rows,
    units_of,
)
from mapper.presentation.charts.style import PALETTE, tips


def margins_chart(verdict: Mapping[str, Any], *, units: Mapping[str, str] | None = None,
                  width: int = 400,
                  height: int = 220) -> alt.LayerChart:
    """Maximum sensitivity Ms across levels, single controller against schedule.

    Parameters
    ----------
    verdict : mapping
        ``points`` (single controller: level, ms, ...), optional ``schedule_points``
        (level, ms) and ``ms_max`` (default 2.0).
    units : mapping, optional
        ``{"input": ..., "output": ...}`` for the level axis.

    Returns
    -------
    altair.LayerChart
        Ms per tested level for each controller, the limit drawn as a rule.
    """
    _unit_in, unit_out = units_of(units)
    limit = number(verdict.get("ms_max"))
    limit = 2.0 if limit is None else limit
    scale = alt.Scale(domain=["single", "schedule"], range=[PALETTE["single"], PALETTE["schedule"]])
    base = alt.Chart({"values": margins_rows(verdict)}).encode(
        x=alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False)),
        y=alt.Y("ms:Q", title="maximum sensitivity Ms (-)", scale=alt.Scale(zero=False, padding=12)),
        color=alt.Color("controller:N", scale=scale, title="controller"),
        strokeDash=alt.StrokeDash("controller:N", title="controller", scale=alt.Scale(
            domain=["single", "schedule"], range=[[1, 0], [6, 3]])))
    lines = base.mark_line(point=True).encode(tooltip=tips("controller:N", "level:Q", "ms:Q"))
    lim = alt.Chart({"values": [{"limit": limit, "label": f"limit Ms = {limit:g}"}]})
    rule = lim.mark_rule(color=PALETTE["mark"], strokeDash=[6, 3], strokeWidth=1.5).encode(y=alt.Y("limit:Q"))
    label = lim.mark_text(align="left", dx=4, dy=-6, color=PALETTE["mark"]).encode(
        y=alt.Y("limit:Q"), x=alt.XValue(0), text=alt.Text("label:N"))
    chart = alt.layer(lines, rule, label).properties(
        width=width, height=height, title="Robustness across the range (Ms at or under the limit)")
    return cast(alt.LayerChart, chart)


def schedule_chart(verdict: Mapping[str, Any], *, units: Mapping[str, str] | None = None,
                   width: int = 400, height: int = 220) -> alt.LayerChart:
    """The gain schedule: controller gain against level, as the table says to apply it.

    Parameters
    ----------
    verdict : mapping
        ``schedule`` rows (level, level_from, level_to, kc, ti, ...) and ``controller``
        (the single controller, drawn as a dashed rule when it has ``kc``).
    units : mapping, optional
        ``{"input": ..., "output": ...}``; controller gain is input units per output unit.

    Returns
    -------
    altair.LayerChart
    """
    unit_in, unit_out = units_of(units)
    rows = schedule_rows(verdict)
    y = alt.Y("kc:Q", title=f"controller gain Kc ({unit_in}/{unit_out})",
              scale=alt.Scale(zero=False, padding=12))
    x = alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False))
    data = alt.Chart({"values": rows})
    if schedule_is_interpolated(verdict):
        line = data.mark_line(interpolate="linear", color=PALETTE["schedule"], strokeWidth=2)
    else:
        line = data.mark_line(interpolate="step-after", color=PALETTE["schedule"], strokeWidth=2)
    layers = [line.encode(x=x, y=y)]
    tested = [r for r in rows if r["tested"] is not None]
    layers.append(alt.Chart({"values": tested}).mark_point(
        color=PALETTE["schedule"], filled=True, size=50).encode(
        x=alt.X("tested:Q", title=f"operating level ({unit_out})"), y=y, tooltip=tips("tested:Q", "kc:Q")))
    single = number((verdict.get("controller") or {}).get("kc"))
    if single is not None:
        layers.append(alt.Chart({"values": [{"kc": single, "label": "single controller"}]})
                      .mark_rule(color=PALETTE["single"], strokeDash=[6, 3]).encode(
                          y=alt.Y("kc:Q"), tooltip=tips("label:N", "kc:Q")))
        layers.append(alt.Chart({"values": [{"kc": single, "label": "single controller"}]})
                      .mark_text(align="left", dx=4, dy=-6, color=PALETTE["single"]).encode(
                          y=alt.Y("kc:Q"), x=alt.XValue(0), text=alt.Text("label:N")))
    chart = alt.layer(*layers).properties(width=width, height=height,
                                          title="Gain schedule: controller gain against level")
    return cast(alt.LayerChart, chart)
