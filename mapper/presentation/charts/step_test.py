"""One test's chart: data and model, 63.2 % point, dead-time mark, residuals, input.

:func:`step_test_chart` builds it with altair; :func:`step_test_spec` gives the same
Vega-Lite specification quickly from a template made once per layout, which is what
makes a report of a thousand tests affordable.
"""

from __future__ import annotations

import copy
import functools
from collections.abc import Mapping, Sequence
from typing import Any

import altair as alt

from mapper.presentation.charts.data import POINTS_PER_TEST, StepParts, step_parts
from mapper.presentation.charts.style import PALETTE, attach, tips


def _step_layout(parts: StepParts, width: int) -> alt.VConcatChart:
    """The chart of one test without its sample rows (attached by the caller)."""
    unit_in, unit_out, marks = parts.unit_in, parts.unit_out, parts.marks
    title = alt.TitleParams(text=parts.title, subtitle=parts.subtitle, anchor="start")
    x = alt.X("t:Q", title="time (s)", scale=alt.Scale(zero=False))
    out_layers = [
        alt.Chart().mark_point(size=10, filled=True, color=PALETTE["data"]).encode(
            x=x, y=alt.Y("y:Q", title=f"output ({unit_out})", scale=alt.Scale(zero=False)),
            tooltip=tips("t:Q", "y:Q")),
    ]
    if parts.model_line:
        out_layers.append(alt.Chart().mark_line(color=PALETTE["model"], strokeWidth=1.6).encode(
            x=x, y=alt.Y("fitted:Q")))
        if marks:
            out_layers.append(alt.Chart({"values": [marks]}).mark_rule(
                color=PALETTE["mark"], strokeDash=[5, 3]).encode(x=alt.X("dead_time_end:Q")))
            out_layers.append(alt.Chart({"values": [marks]}).mark_point(
                color=PALETTE["mark"], shape="diamond", size=90, filled=True).encode(
                x=alt.X("t63:Q"), y=alt.Y("y63:Q"), tooltip=tips("t63:Q", "y63:Q")))
            out_layers.append(alt.Chart({"values": [marks]}).mark_text(
                color=PALETTE["mark"], align="left", dx=8, dy=8).encode(
                x=alt.X("t63:Q"), y=alt.Y("y63:Q"), text=alt.TextValue("63.2 %")))
    if parts.step is not None:
        out_layers.append(alt.Chart({"values": [{"step": parts.step}]}).mark_rule(
            color=PALETTE["trend"], strokeDash=[1, 3]).encode(x=alt.X("step:Q")))
    top = alt.layer(*out_layers).properties(width=width, height=220)
    panels: list[Any] = [top]
    if parts.residuals:
        panels.append(alt.Chart().mark_line(color=PALETTE["data"], strokeWidth=1).encode(
            x=x, y=alt.Y("residual:Q", title=f"residual ({unit_out})")).properties(
            width=width, height=80))
    panels.append(alt.Chart().mark_line(color=PALETTE["up"], interpolate="step-after").encode(
        x=x, y=alt.Y("u:Q", title=f"input ({unit_in})", scale=alt.Scale(zero=False))).properties(
        width=width, height=70))
    return alt.vconcat(*panels, title=title)


def step_test_chart(row: Mapping[str, Any], t: Sequence[float], u: Sequence[float],
                    y: Sequence[float], fitted: Sequence[float] | None = None,
                    step_time: float | None = None, *, units: Mapping[str, str] | None = None,
                    points: int = POINTS_PER_TEST, width: int = 600) -> alt.VConcatChart:
    """One test: data and fitted model, 63.2 % point, dead-time mark, residuals, input.

    Parameters
    ----------
    row : mapping
        The test's params row (``test_id, level, direction, gain, time_constant,
        dead_time, input_step, quality, flags`` ...).
    t, u, y : array_like
        Time (s), input and output samples.
    fitted : array_like or None
        The model's output on ``t``; NaN or None where there is no model.
    step_time : float or None
        Time of the input step (s); found from ``u`` when None.
    units : mapping, optional
        ``{"input": ..., "output": ...}`` for the axis titles.

    Returns
    -------
    altair.VConcatChart
        Output panel, residual panel underneath, input panel at the bottom; the title
        carries the test name, quality and flags.

    Notes
    -----
    The 63.2 % point sits one time constant after the response starts, i.e. at
    step time + dead time + time constant, at 1 - e^-1 of the model's change
    (graphical method, common practice in the trade).
    """
    parts = step_parts(row, t, u, y, fitted, step_time, units, points)
    return attach(_step_layout(parts, width), parts.rows)


# Placeholders that mark where each test's own values go in a cached specification.
_ROWS_MARK = {"t": -1.0e300, "y": -2.0e300, "u": -3.0e300}
_MARKS_MARK = {"dead_time_end": -4.0e300, "t63": -5.0e300, "y63": -6.0e300}
_STEP_MARK = {"step": -7.0e300}


@functools.lru_cache(maxsize=64)
def _step_template(layout_key: tuple, width: int) -> tuple[dict, str, str | None, str | None]:
    """Vega-Lite specification of one test's chart with placeholder data, made once per
    layout by altair (and checked against the schema); returns it with the names of its
    sample, mark and step datasets."""
    unit_in, unit_out, residuals, model_line, has_marks, has_step = layout_key
    parts = StepParts(rows=[dict(_ROWS_MARK)], title="", subtitle="",
                      marks=dict(_MARKS_MARK) if has_marks else None,
                      step=_STEP_MARK["step"] if has_step else None, residuals=residuals,
                      model_line=model_line, unit_in=unit_in, unit_out=unit_out)
    spec = attach(_step_layout(parts, width), parts.rows).to_dict(validate=True)
    names: dict[str, str | None] = {"rows": None, "marks": None, "step": None}
    for name, values in spec.get("datasets", {}).items():
        for kind, mark in (("rows", _ROWS_MARK), ("marks", _MARKS_MARK), ("step", _STEP_MARK)):
            if values == [mark]:
                names[kind] = name
    rows_name = names["rows"]
    if rows_name is None:  # altair stopped gathering inline data: say so loudly
        raise RuntimeError("chart template: the sample rows were not found in the specification")
    spec["datasets"] = {}
    return spec, rows_name, names["marks"], names["step"]


def step_test_spec(row: Mapping[str, Any], t: Sequence[float], u: Sequence[float],
                   y: Sequence[float], fitted: Sequence[float] | None = None,
                   step_time: float | None = None, *, units: Mapping[str, str] | None = None,
                   points: int = POINTS_PER_TEST, width: int = 600,
                   title: str | None = None, subtitle: str | None = None) -> dict:
    """The Vega-Lite specification of :func:`step_test_chart`, made quickly.

    Same arguments and the same specification as ``step_test_chart(...).to_dict()``
    (dataset names aside). altair builds each layout once; every further test copies that
    specification and puts in its own rows, marks and title.

    Parameters
    ----------
    title, subtitle : str, optional
        Replace the chart's title (by default the test name, level and direction) and
        subtitle (by default quality and flags).

    Returns
    -------
    dict
        A Vega-Lite specification (plain JSON types).
    """
    parts = step_parts(row, t, u, y, fitted, step_time, units, points)
    key = (parts.unit_in, parts.unit_out, parts.residuals, parts.model_line,
           parts.marks is not None, parts.step is not None)
    template, rows_name, marks_name, step_name = _step_template(key, int(width))
    spec = copy.deepcopy(template)
    spec["title"]["text"] = parts.title if title is None else title
    spec["title"]["subtitle"] = parts.subtitle if subtitle is None else subtitle
    datasets = {rows_name: parts.rows}
    if marks_name is not None:
        datasets[marks_name] = [parts.marks]
    if step_name is not None:
        datasets[step_name] = [{"step": parts.step}]
    spec["datasets"] = datasets
    return spec
