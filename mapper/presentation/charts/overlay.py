"""The overlay: every test normalised on one plot, so odd tests stand out."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import altair as alt

from mapper.presentation.charts.data import (
    FRACTION_AT_TIME_CONSTANT,
    POINTS_PER_TEST,
    OverlaySeries,
    overlay_meta,
    overlay_rows,
    overlay_series,
)
from mapper.presentation.charts.style import PALETTE, QUALITIES, attach, tips


def overlay_chart_from_series(series: Sequence[OverlaySeries], *, scale_time: bool = False,
                              width: int = 600, height: int = 300,
                              rows: list[dict] | None = None) -> alt.LayerChart:
    """The overlay chart from series made by :func:`overlay_series`.

    ``rows`` replaces the data rows (the report passes a one-row placeholder and streams
    the real rows into the file itself); by default they are made from ``series``.
    """
    x_title = "time from step / time constant (-)" if scale_time else "time from step (s)"
    quality = alt.Scale(domain=QUALITIES, range=[PALETTE[q] for q in QUALITIES])
    lines = alt.Chart().mark_line(strokeWidth=1.2, opacity=0.8).encode(
        x=alt.X("elapsed:Q", title=x_title),
        y=alt.Y("response:Q", title="response / its own change (-)"),
        color=alt.Color("quality:N", scale=quality, title="quality"),
        detail=alt.Detail("test_id:N"),
        tooltip=tips("test_id:N", "quality:N", "direction:N", "level:Q"),
    ).transform_lookup(lookup="test_id", from_=alt.LookupData(
        data={"values": overlay_meta(series)}, key="test_id",
        fields=["quality", "direction", "level"]))
    refs = alt.Chart({"values": [{"r": 0.0}, {"r": FRACTION_AT_TIME_CONSTANT}, {"r": 1.0}]})
    rules = refs.mark_rule(color=PALETTE["mark"], strokeDash=[4, 3]).encode(y=alt.Y("r:Q"))
    chart = alt.layer(lines, rules, width=width, height=height, title="All tests, normalised")
    return attach(chart, list(overlay_rows(series)) if rows is None else rows)


def overlay_chart(tests: Iterable[Any], *, scale_time: bool = False,
                  points: int = POINTS_PER_TEST // 2, width: int = 600,
                  height: int = 300) -> alt.LayerChart:
    """All tests on one normalised plot so odd tests stand out.

    Each response is divided by its own change (before the step to the last tenth of the
    record) and time is counted from the step, optionally divided by the test's time
    constant, so a well-behaved campaign collapses onto one curve.

    Parameters
    ----------
    tests : iterable
        Test dicts with ``t, u, y`` arrays, ``step_time`` and the params row keys, or
        tuples ``(row, t, u, y[, fitted[, step_time]])``.
    scale_time : bool, default False
        Divide time by each test's time constant; tests without one are left out.
    points : int, default 150
        Samples kept per test.

    Returns
    -------
    altair.LayerChart
        Lines coloured by quality, with reference rules at 0, 63.2 % and 1.
    """
    series = [s for s in (overlay_series(test, scale_time=scale_time, points=points)
                          for test in tests) if s is not None]
    return overlay_chart_from_series(series, scale_time=scale_time, width=width, height=height)
