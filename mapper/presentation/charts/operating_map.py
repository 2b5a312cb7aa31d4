"""The operating map: model parameters against operating level."""

from __future__ import annotations

from collections.abc import Mapping

import altair as alt
import pandas as pd

from mapper.presentation.charts.data import MAP_PARAMETERS, map_points, trend_rows, units_of
from mapper.presentation.charts.style import PALETTE, QUALITIES, attach, direction_scales, tips


def operating_map_chart(params: pd.DataFrame, trend: pd.DataFrame | None = None, *,
                        units: Mapping[str, str] | None = None, width: int = 300,
                        height: int = 200) -> alt.ConcatChart:
    """Gain, time constant, dead time and gain / time constant against operating level.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the ``test_params`` view; rejected tests are left out.
    trend : pandas.DataFrame or None
        Columns ``parameter, level, value, lo, hi`` (the fitted trend and its 95 % band).
    units : mapping, optional
        ``{"input": ..., "output": ...}`` for the axis titles.
    width, height : int
        Size of each panel in pixels.

    Returns
    -------
    altair.ConcatChart
        Four panels; each test is a point with its 95 % interval as an error bar, up and
        down steps told apart by colour and shape, the trend as a line over its band.
    """
    unit_in, unit_out = units_of(units)
    titles = {
        "gain": f"gain ({unit_out}/{unit_in})",
        "time_constant": "time constant (s)",
        "dead_time": "dead time (s)",
        "gain_over_time_constant": f"gain / time constant ({unit_out}/{unit_in}/s)",
    }
    colour, shape = direction_scales()
    x = alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False))
    panels = []
    for name in MAP_PARAMETERS:
        y_title = titles[name]
        layers = []
        trend_part = trend_rows(trend, name)
        if trend_part:
            tdata = {"values": trend_part}
            layers.append(alt.Chart(tdata).mark_area(color=PALETTE["band"], opacity=0.6).encode(
                x=x, y=alt.Y("lo:Q", title=y_title), y2=alt.Y2("hi:Q")))
            layers.append(alt.Chart(tdata).mark_line(color=PALETTE["trend"]).encode(
                x=x, y=alt.Y("value:Q", title=y_title)))
        points = alt.Chart().transform_filter(alt.datum.parameter == name)
        tooltip = ["test_id:N", "direction:N", "quality:N", "level:Q", "value:Q", "lo:Q", "hi:Q"]
        layers.append(points.mark_rule(strokeWidth=1.5).encode(
            x=x, y=alt.Y("lo:Q", title=y_title), y2=alt.Y2("hi:Q"),
            color=alt.Color("direction:N", scale=colour, title="step")))
        layers.append(points.mark_point(filled=True, size=70).encode(
            x=x, y=alt.Y("value:Q", title=y_title, scale=alt.Scale(zero=False)),
            color=alt.Color("direction:N", scale=colour, title="step"),
            shape=alt.Shape("direction:N", scale=shape, title="step"),
            opacity=alt.Opacity("quality:O", legend=None, scale=alt.Scale(
                domain=QUALITIES, range=[1.0, 0.45, 0.45])),
            tooltip=tips(*tooltip)))
        panels.append(alt.layer(*layers).properties(width=width, height=height, title=y_title))
    chart = alt.concat(*panels, columns=2,
                       title="Operating map: model parameters against level (bars: 95 % intervals)")
    return attach(chart, map_points(params))
