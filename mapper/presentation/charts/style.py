"""What every chart shares: the palette, the step shapes and small altair helpers.

One palette, :data:`PALETTE`, is used by every chart so that a colour keeps its meaning
across the report. Up and down steps differ by shape *and* colour. The hues are chosen
to stay apart for the common forms of colour-vision deficiency.
"""

from __future__ import annotations

from typing import Any

import altair as alt

#: Colour of each role, shared by every chart (hex). Our own assignment.
PALETTE: dict[str, str] = {
    "up": "#1F6FB4",  # blue
    "down": "#E08A00",  # orange
    "data": "#9A9A9A",  # mid grey
    "model": "#1A1A1A",  # near black
    "mark": "#C2185B",  # magenta: 63.2 % point, dead-time mark, limits
    "trend": "#4D4D4D",
    "band": "#D9D9D9",
    "single": "#2E9C8A",  # teal: one controller for the whole range
    "schedule": "#7B4FA0",  # purple: gain schedule
    "good": "#B3B3B3",
    "suspect": "#8C6D1F",  # ochre
    "rejected": "#A50026",  # dark red
}

#: Point shape of each step direction.
DIRECTION_MARKS: dict[str, str] = {"up": "triangle-up", "down": "triangle-down"}

DIRECTIONS = ["up", "down"]
QUALITIES = ["good", "suspect", "rejected"]

#: Vega-Lite version the specs are written for (e.g. "v6.4.1"); the report bundles the
#: matching JavaScript so the HTML needs no network.
VEGA_LITE_VERSION: str = alt.SCHEMA_VERSION


def attach(chart: Any, rows: list[dict]) -> Any:
    """Give a composed chart its inline data, inherited by every view inside it.

    Set after composing: altair deep-copies a chart's data at each composition step,
    which costs more than everything else on a report of many tests.
    """
    chart.data = {"values": rows}
    return chart


def tips(*fields: str) -> list:
    """Tooltip channels for the given ``field:type`` names."""
    # channel objects, not strings: altair's string wrapping is slow on long reports
    return [alt.Tooltip(f) for f in fields]


def direction_scales() -> tuple[alt.Scale, alt.Scale]:
    """Colour and shape scales of the step direction (up, down)."""
    colour = alt.Scale(domain=DIRECTIONS, range=[PALETTE[d] for d in DIRECTIONS])
    shape = alt.Scale(domain=DIRECTIONS, range=[DIRECTION_MARKS[d] for d in DIRECTIONS])
    return colour, shape
