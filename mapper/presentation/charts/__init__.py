"""Chart builders: the only package that imports altair.

Every builder takes plain data (the ``test_params`` frame, the trend frame, the verdict
dict, sample arrays) and returns an :class:`altair.Chart` (or a layered / concatenated
chart). Builders never save anything; :mod:`mapper.presentation.report` turns the charts
into HTML and PNG, and a notebook shows them inline by itself.

Layout: one module per chart (:mod:`.operating_map`, :mod:`.overlay`, :mod:`.step_test`,
:mod:`.verdict`, :mod:`.closed_loop`) holding only the Vega-Lite description; the data shaping they share
(rounding, decimation, rows) lives in :mod:`.data`, which does not import altair, and the
palette and altair helpers in :mod:`.style`.

Conventions
-----------
* Time is in seconds, levels in output units; axis titles carry the units.
* One palette, :data:`PALETTE`, used by every chart so that a colour keeps its meaning.
* Data go inline as ``{"values": ...}`` on the outermost view that needs them,
  so layers share one copy and altair's row limit for data frames does not apply.
"""

from __future__ import annotations

from mapper.presentation.charts.closed_loop import closed_loop_chart
from mapper.presentation.charts.data import (
    FRACTION_AT_TIME_CONSTANT,
    MAP_PARAMETERS,
    POINTS_PER_TEST,
    OverlaySeries,
    decimate,
    overlay_rows,
    overlay_series,
    schedule_rows,
    step_time_from_input,
    unpack_test,
)
from mapper.presentation.charts.operating_map import operating_map_chart
from mapper.presentation.charts.overlay import overlay_chart, overlay_chart_from_series
from mapper.presentation.charts.step_test import step_test_chart, step_test_spec
from mapper.presentation.charts.style import DIRECTION_MARKS, PALETTE, VEGA_LITE_VERSION
from mapper.presentation.charts.verdict import margins_chart, schedule_chart

__all__ = [
    "DIRECTION_MARKS",
    "FRACTION_AT_TIME_CONSTANT",
    "MAP_PARAMETERS",
    "PALETTE",
    "POINTS_PER_TEST",
    "VEGA_LITE_VERSION",
    "OverlaySeries",
    "closed_loop_chart",
    "decimate",
    "margins_chart",
    "operating_map_chart",
    "overlay_chart",
    "overlay_chart_from_series",
    "overlay_rows",
    "overlay_series",
    "schedule_chart",
    "schedule_rows",
    "step_test_chart",
    "step_test_spec",
    "step_time_from_input",
    "unpack_test",
]
