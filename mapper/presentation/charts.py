"""Chart builders: the only module that imports altair.

Every builder takes plain data (the ``test_params`` frame, the trend frame, the verdict
dict, sample arrays) and returns an :class:`altair.Chart` (or a layered / concatenated
chart). Builders never save anything; :mod:`mapper.presentation.report` turns the charts into HTML
and PNG, and a notebook shows them inline by itself.

Conventions
-----------
* Time is in seconds, levels in output units; axis titles carry the units.
* One palette, :data:`PALETTE`, used by every chart so that a colour keeps its meaning
  across the report. Up and down steps differ by shape *and* colour. The hues are
  chosen to stay apart for the common forms of colour-vision deficiency.
* Per-test samples are decimated (min/max per bucket, so spikes survive) to about
  :data:`POINTS_PER_TEST` points, and numbers are rounded to six significant digits,
  so a report of a hundred tests stays a few megabytes.
* Data go inline as ``{"values": ...}`` on the outermost view that needs them,
  so layers share one copy and altair's row limit for data frames does not apply.
"""

from __future__ import annotations

import copy
import functools
import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import altair as alt
import numpy as np
import pandas as pd

from mapper.signals import step_time

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

#: Target number of samples kept per test in a chart.
POINTS_PER_TEST = 300

#: Fraction of the final change at one time constant after the response starts.
FRACTION_AT_TIME_CONSTANT = 1.0 - math.exp(-1.0)  # 0.632...

MAP_PARAMETERS = ("gain", "time_constant", "dead_time", "gain_over_time_constant")

_DIRECTIONS = ["up", "down"]
_QUALITIES = ["good", "suspect", "rejected"]


# --------------------------------------------------------------------------- helpers
def _units(units: Mapping[str, str] | None) -> tuple[str, str]:
    units = units or {}
    return str(units.get("input") or "input units"), str(units.get("output") or "output units")


def _number(value: Any) -> float | None:
    """A JSON-safe float rounded to six significant digits, or None."""
    if value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    if not math.isfinite(x):
        return None
    return float(f"{x:.6g}")


def _short(value: Any) -> float | None:
    x = _number(value)
    return None if x is None else float(f"{x:.4g}")


def _attach(chart: Any, rows: list[dict]) -> Any:
    """Give a composed chart its inline data, inherited by every view inside it.

    Set after composing: altair deep-copies a chart's data at each composition step,
    which costs more than everything else on a report of many tests.
    """
    chart.data = {"values": rows}
    return chart


def _tips(*fields: str) -> list:
    # channel objects, not strings: altair's string wrapping is slow on long reports
    return [alt.Tooltip(f) for f in fields]


def _text(value: Any) -> str:
    return "" if value is None else str(value)


def _flags(value: Any) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [value] if value else []
    try:
        return [str(f) for f in value]
    except TypeError:
        return [str(value)]


def _direction_scales() -> tuple[alt.Scale, alt.Scale]:
    colour = alt.Scale(domain=_DIRECTIONS, range=[PALETTE[d] for d in _DIRECTIONS])
    shape = alt.Scale(domain=_DIRECTIONS, range=[DIRECTION_MARKS[d] for d in _DIRECTIONS])
    return colour, shape


def decimate(t: np.ndarray, y: np.ndarray, points: int = POINTS_PER_TEST) -> np.ndarray:
    """Indices that keep about ``points`` samples, including each bucket's min and max.

    Parameters
    ----------
    t, y : numpy.ndarray
        Time and signal, same length.
    points : int, default 300
        Target number of samples kept.

    Returns
    -------
    numpy.ndarray
        Sorted integer indices into ``t``; first and last sample always kept.
    """
    n = len(t)
    if n <= points:
        return np.arange(n)
    buckets = max(points // 2, 1)
    edges = np.linspace(0, n, buckets + 1).astype(int)
    y = np.asarray(y, dtype=float)
    bucket = np.repeat(np.arange(buckets), np.diff(edges))
    starts = edges[:-1][np.diff(edges) > 0]
    # a stable sort inside each bucket puts its first minimum (maximum) first and NaN
    # last, so ties keep the earliest sample and an all-NaN bucket gives its first one
    lowest = np.lexsort((y, bucket))[starts]
    highest = np.lexsort((-y, bucket))[starts]
    return np.unique(np.concatenate(([0, n - 1], lowest, highest))).astype(int)


def step_time_from_input(t: np.ndarray, u: np.ndarray) -> float | None:
    """Time at which the input covers half of its largest move, or None if flat.

    A call-through to :func:`mapper.signals.step_time`, the one move finder.
    """
    return step_time(t, u)


def _settled_change(t: np.ndarray, y: np.ndarray, step_time: float) -> tuple[float, float]:
    """Output before the step (mean) and its change to the last tenth of the record."""
    before = y[t < step_time]
    y0 = float(np.nanmean(before)) if len(before) else float(y[0])
    tail = y[max(int(0.9 * len(y)), 1) - 1 :]
    return y0, float(np.nanmean(tail)) - y0


def unpack_test(test: Any) -> tuple[dict, np.ndarray, np.ndarray, np.ndarray, Any, Any]:
    """Split one test into (row, t, u, y, fitted, step_time).

    Accepts a dict with ``t, u, y, fitted, step_time`` keys beside the params row, or a
    tuple ``(row, t, u, y[, fitted[, step_time]])`` where ``fitted`` may also be an
    identification result with ``fitted(t, u)`` and ``step_time``.
    """
    if isinstance(test, Mapping):
        row = dict(test)
        return (row, np.asarray(row["t"], float), np.asarray(row["u"], float),
                np.asarray(row["y"], float), row.get("fitted"), row.get("step_time"))
    items = list(test)
    row = dict(items[0])
    t, u, y = (np.asarray(items[k], float) for k in (1, 2, 3))
    fitted = items[4] if len(items) > 4 else row.get("fitted")
    step = items[5] if len(items) > 5 else row.get("step_time")
    if hasattr(fitted, "fitted"):  # an identification result: ask it for its output
        step = getattr(fitted, "step_time", None) if step is None else step
        fitted = fitted.fitted(t, u)
    return row, t, u, y, fitted, step


# --------------------------------------------------------------------- operating map
def _map_points(params: pd.DataFrame) -> list[dict]:
    rows: list[dict] = []
    if params is None or len(params) == 0:
        return rows
    for rec in params.to_dict("records"):
        if rec.get("quality") == "rejected":
            continue
        base = {
            "test_id": _text(rec.get("test_id")),
            "level": _number(rec.get("level")),
            "direction": _text(rec.get("direction")),
            "quality": _text(rec.get("quality")),
        }
        if base["level"] is None:
            continue
        for name in ("gain", "time_constant", "dead_time"):
            value = _number(rec.get(name))
            if value is None:
                continue
            rows.append({**base, "parameter": name, "value": value,
                         "lo": _number(rec.get(f"{name}_lo")), "hi": _number(rec.get(f"{name}_hi"))})
        gain, tau = _number(rec.get("gain")), _number(rec.get("time_constant"))
        if gain is not None and tau:
            # interval from the interval ends: conservative, ignores the K-tau correlation
            g_lo, g_hi = _number(rec.get("gain_lo")), _number(rec.get("gain_hi"))
            t_lo, t_hi = _number(rec.get("time_constant_lo")), _number(rec.get("time_constant_hi"))
            lo = hi = None
            if None not in (g_lo, g_hi, t_lo, t_hi) and t_lo > 0 and t_hi > 0:
                ends = [g_lo / t_lo, g_lo / t_hi, g_hi / t_lo, g_hi / t_hi]
                lo, hi = _number(min(ends)), _number(max(ends))
            rows.append({**base, "parameter": "gain_over_time_constant", "value": _number(gain / tau),
                         "lo": lo, "hi": hi})
    return rows


def _trend_rows(trend: pd.DataFrame | None, parameter: str) -> list[dict]:
    if trend is None or len(trend) == 0:
        return []
    part = trend[trend["parameter"] == parameter]
    return [{"level": _number(r["level"]), "value": _number(r["value"]),
             "lo": _number(r.get("lo")), "hi": _number(r.get("hi"))}
            for r in part.to_dict("records")]


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
    unit_in, unit_out = _units(units)
    titles = {
        "gain": f"gain ({unit_out}/{unit_in})",
        "time_constant": "time constant (s)",
        "dead_time": "dead time (s)",
        "gain_over_time_constant": f"gain / time constant ({unit_out}/{unit_in}/s)",
    }
    colour, shape = _direction_scales()
    x = alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False))
    panels = []
    for name in MAP_PARAMETERS:
        y_title = titles[name]
        layers = []
        trend_rows = _trend_rows(trend, name)
        if trend_rows:
            tdata = {"values": trend_rows}
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
                domain=_QUALITIES, range=[1.0, 0.45, 0.45])),
            tooltip=_tips(*tooltip)))
        panels.append(alt.layer(*layers).properties(width=width, height=height, title=y_title))
    chart = alt.concat(*panels, columns=2,
                       title="Operating map: model parameters against level (bars: 95 % intervals)")
    return _attach(chart, _map_points(params))


# ---------------------------------------------------------------------- overlay
@dataclass(frozen=True)
class OverlaySeries:
    """One test's normalised, thinned response for the overlay (a few kB, no samples).

    Attributes
    ----------
    test_id, quality, direction : str
    level : float or None
    elapsed : numpy.ndarray
        Time from the step (s), or from the step over the time constant (-).
    response : numpy.ndarray
        Output change over the test's own change (-).
    """

    test_id: str
    quality: str
    direction: str
    level: float | None
    elapsed: np.ndarray
    response: np.ndarray


def overlay_series(test: Any, *, scale_time: bool = False,
                   points: int = POINTS_PER_TEST // 2) -> OverlaySeries | None:
    """The overlay's share of one test, or None when it cannot be normalised.

    Parameters
    ----------
    test : dict or tuple
        As for :func:`overlay_chart`.
    scale_time : bool, default False
        Divide time by the test's time constant.
    points : int, default 150
        Samples kept.

    Returns
    -------
    OverlaySeries or None
        None when the test has no step, fewer than three samples, no change, or (with
        ``scale_time``) no time constant.
    """
    row, t, u, y, _fitted, step = unpack_test(test)
    step = _number(step)
    if step is None:
        step = step_time_from_input(t, u)
    if step is None or len(t) < 3:
        return None
    y0, change = _settled_change(t, y, step)
    if not math.isfinite(change) or abs(change) < 1e-12:
        return None
    elapsed = t - step
    if scale_time:
        tau = _number(row.get("time_constant"))
        if not tau or tau <= 0:
            return None
        elapsed = elapsed / tau
    response = (y - y0) / change
    idx = decimate(elapsed, response, points)
    return OverlaySeries(_text(row.get("test_id")), _text(row.get("quality")),
                         _text(row.get("direction")), _number(row.get("level")),
                         elapsed[idx].copy(), response[idx].copy())


def overlay_rows(series: Iterable[OverlaySeries]) -> Iterator[dict]:
    """Data rows of the overlay, one per kept sample, made on demand."""
    for s in series:
        # four significant digits are plenty for a shape comparison and halve the bytes
        for e, r in zip(s.elapsed.tolist(), s.response.tolist()):
            yield {"test_id": s.test_id, "elapsed": _short(e), "response": _short(r)}


def overlay_chart_from_series(series: Sequence[OverlaySeries], *, scale_time: bool = False,
                              width: int = 600, height: int = 300,
                              rows: list[dict] | None = None) -> alt.LayerChart:
    """The overlay chart from series made by :func:`overlay_series`.

    ``rows`` replaces the data rows (the report passes a one-row placeholder and streams
    the real rows into the file itself); by default they are made from ``series``.
    """
    meta = [{"test_id": s.test_id, "quality": s.quality, "direction": s.direction,
             "level": s.level} for s in series]
    x_title = "time from step / time constant (-)" if scale_time else "time from step (s)"
    quality = alt.Scale(domain=_QUALITIES, range=[PALETTE[q] for q in _QUALITIES])
    lines = alt.Chart().mark_line(strokeWidth=1.2, opacity=0.8).encode(
        x=alt.X("elapsed:Q", title=x_title),
        y=alt.Y("response:Q", title="response / its own change (-)"),
        color=alt.Color("quality:N", scale=quality, title="quality"),
        detail=alt.Detail("test_id:N"),
        tooltip=_tips("test_id:N", "quality:N", "direction:N", "level:Q"),
    ).transform_lookup(lookup="test_id", from_=alt.LookupData(
        data={"values": meta}, key="test_id", fields=["quality", "direction", "level"]))
    refs = alt.Chart({"values": [{"r": 0.0}, {"r": FRACTION_AT_TIME_CONSTANT}, {"r": 1.0}]})
    rules = refs.mark_rule(color=PALETTE["mark"], strokeDash=[4, 3]).encode(y=alt.Y("r:Q"))
    chart = alt.layer(lines, rules, width=width, height=height, title="All tests, normalised")
    return _attach(chart, list(overlay_rows(series)) if rows is None else rows)


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


# ---------------------------------------------------------------------- one test
@dataclass(frozen=True)
class _StepParts:
    """What one test's chart needs: thinned rows, title and the layout's switches."""

    rows: list
    title: str
    subtitle: str
    marks: dict | None
    step: float | None
    residuals: bool  # a model curve exists: fitted line data and residual panel
    model_line: bool  # some of the model curve is finite
    unit_in: str
    unit_out: str


def _step_parts(row: Mapping[str, Any], t: Sequence[float], u: Sequence[float],
                y: Sequence[float], fitted: Sequence[float] | None, step_time: float | None,
                units: Mapping[str, str] | None, points: int) -> _StepParts:
    unit_in, unit_out = _units(units)
    t = np.asarray(t, dtype=float)
    u = np.asarray(u, dtype=float)
    y = np.asarray(y, dtype=float)
    fit = None if fitted is None else np.asarray(fitted, dtype=float)
    if fit is not None and fit.shape != y.shape:
        fit = None
    step = _number(step_time)
    if step is None:
        step = step_time_from_input(t, u)
    idx = decimate(t, y, points)
    ts, us, ys = t[idx].tolist(), u[idx].tolist(), y[idx].tolist()
    if fit is None:
        rows = [{"t": _number(a), "y": _number(b), "u": _number(c)} for a, b, c in zip(ts, ys, us)]
    else:
        fs = fit[idx].tolist()
        rows = [{"t": _number(a), "y": _number(b), "u": _number(c), "fitted": _number(f),
                 "residual": _number(b - f)} for a, b, c, f in zip(ts, ys, us, fs)]
    model_line = fit is not None and bool(np.any(np.isfinite(fit)))
    quality = _text(row.get("quality")) or "unjudged"
    flags = _flags(row.get("flags"))
    return _StepParts(
        rows=rows,
        title=f"{_text(row.get('test_id'))}: level {_fmt(row.get('level'))} {unit_out}, "
              f"{_text(row.get('direction'))} step",
        subtitle=f"quality: {quality}" + (f"; flags: {', '.join(flags)}" if flags else ""),
        marks=_model_marks(row, t, fit, step) if model_line else None,
        step=step, residuals=fit is not None, model_line=model_line,
        unit_in=unit_in, unit_out=unit_out)


def _step_layout(parts: _StepParts, width: int) -> alt.VConcatChart:
    """The chart of one test without its sample rows (attached by the caller)."""
    unit_in, unit_out, marks = parts.unit_in, parts.unit_out, parts.marks
    title = alt.TitleParams(text=parts.title, subtitle=parts.subtitle, anchor="start")
    x = alt.X("t:Q", title="time (s)", scale=alt.Scale(zero=False))
    out_layers = [
        alt.Chart().mark_point(size=10, filled=True, color=PALETTE["data"]).encode(
            x=x, y=alt.Y("y:Q", title=f"output ({unit_out})", scale=alt.Scale(zero=False)),
            tooltip=_tips("t:Q", "y:Q")),
    ]
    if parts.model_line:
        out_layers.append(alt.Chart().mark_line(color=PALETTE["model"], strokeWidth=1.6).encode(
            x=x, y=alt.Y("fitted:Q")))
        if marks:
            out_layers.append(alt.Chart({"values": [marks]}).mark_rule(
                color=PALETTE["mark"], strokeDash=[5, 3]).encode(x=alt.X("dead_time_end:Q")))
            out_layers.append(alt.Chart({"values": [marks]}).mark_point(
                color=PALETTE["mark"], shape="diamond", size=90, filled=True).encode(
                x=alt.X("t63:Q"), y=alt.Y("y63:Q"), tooltip=_tips("t63:Q", "y63:Q")))
            out_layers.append(alt.Chart({"values": [marks]}).mark_text(
                color=PALETTE["mark"], align="left", dx=8, dy=8).encode(
                x=alt.X("t63:Q"), y=alt.Y("y63:Q"), text=alt.TextValue("63.2 %")))
    if parts.step is not None:
        out_layers.append(alt.Chart({"values": [{"step": parts.step}]}).mark_rule(
            color=PALETTE["trend"], strokeDash=[1, 3]).encode(x=alt.X("step:Q")))
    top = alt.layer(*out_layers).properties(width=width, height=220)
    panels = [top]
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
    parts = _step_parts(row, t, u, y, fitted, step_time, units, points)
    return _attach(_step_layout(parts, width), parts.rows)


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
    parts = _StepParts(rows=[dict(_ROWS_MARK)], title="", subtitle="",
                       marks=dict(_MARKS_MARK) if has_marks else None,
                       step=_STEP_MARK["step"] if has_step else None, residuals=residuals,
                       model_line=model_line, unit_in=unit_in, unit_out=unit_out)
    spec = _attach(_step_layout(parts, width), parts.rows).to_dict(validate=True)
    names: dict[str, str | None] = {"rows": None, "marks": None, "step": None}
    for name, values in spec.get("datasets", {}).items():
        for kind, mark in (("rows", _ROWS_MARK), ("marks", _MARKS_MARK), ("step", _STEP_MARK)):
            if values == [mark]:
                names[kind] = name
    if names["rows"] is None:  # altair stopped gathering inline data: say so loudly
        raise RuntimeError("chart template: the sample rows were not found in the specification")
    spec["datasets"] = {}
    return spec, names["rows"], names["marks"], names["step"]


def step_test_spec(row: Mapping[str, Any], t: Sequence[float], u: Sequence[float],
                   y: Sequence[float], fitted: Sequence[float] | None = None,
                   step_time: float | None = None, *, units: Mapping[str, str] | None = None,
                   points: int = POINTS_PER_TEST, width: int = 600) -> dict:
    """The Vega-Lite specification of :func:`step_test_chart`, made quickly.

    Same arguments and the same specification as ``step_test_chart(...).to_dict()``
    (dataset names aside). altair builds each layout once; every further test copies that
    specification and puts in its own rows, marks and title, which is what makes a report
    of a thousand tests affordable.

    Returns
    -------
    dict
        A Vega-Lite specification (plain JSON types).
    """
    parts = _step_parts(row, t, u, y, fitted, step_time, units, points)
    key = (parts.unit_in, parts.unit_out, parts.residuals, parts.model_line,
           parts.marks is not None, parts.step is not None)
    template, rows_name, marks_name, step_name = _step_template(key, int(width))
    spec = copy.deepcopy(template)
    spec["title"]["text"] = parts.title
    spec["title"]["subtitle"] = parts.subtitle
    datasets = {rows_name: parts.rows}
    if marks_name is not None:
        datasets[marks_name] = [parts.marks]
    if step_name is not None:
        datasets[step_name] = [{"step": parts.step}]
    spec["datasets"] = datasets
    return spec


def _fmt(value: Any) -> str:
    x = _number(value)
    return "?" if x is None else f"{x:.4g}"


def _model_marks(row: Mapping[str, Any], t: np.ndarray, fit: np.ndarray,
                 step: float | None) -> dict | None:
    gain, tau, theta = (_number(row.get(k)) for k in ("gain", "time_constant", "dead_time"))
    input_step = _number(row.get("input_step"))
    if step is None or None in (gain, tau, theta, input_step):
        return None
    before = fit[(t <= step) & np.isfinite(fit)]
    y0 = float(before[-1]) if len(before) else float(np.nanmean(fit[:1]))
    return {"dead_time_end": _number(step + theta), "t63": _number(step + theta + tau),
            "y63": _number(y0 + FRACTION_AT_TIME_CONSTANT * gain * input_step)}


# ------------------------------------------------------------------ verdict charts
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
    _unit_in, unit_out = _units(units)
    limit = _number(verdict.get("ms_max"))
    limit = 2.0 if limit is None else limit
    rows = [{"controller": "single", "level": _number(p.get("level")), "ms": _number(p.get("ms"))}
            for p in verdict.get("points") or []]
    rows += [{"controller": "schedule", "level": _number(p.get("level")), "ms": _number(p.get("ms"))}
             for p in verdict.get("schedule_points") or []]
    scale = alt.Scale(domain=["single", "schedule"], range=[PALETTE["single"], PALETTE["schedule"]])
    base = alt.Chart({"values": rows}).encode(
        x=alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False)),
        y=alt.Y("ms:Q", title="maximum sensitivity Ms (-)", scale=alt.Scale(zero=False, padding=12)),
        color=alt.Color("controller:N", scale=scale, title="controller"),
        strokeDash=alt.StrokeDash("controller:N", title="controller", scale=alt.Scale(
            domain=["single", "schedule"], range=[[1, 0], [6, 3]])))
    lines = base.mark_line(point=True).encode(tooltip=_tips("controller:N", "level:Q", "ms:Q"))
    lim = alt.Chart({"values": [{"limit": limit, "label": f"limit Ms = {limit:g}"}]})
    rule = lim.mark_rule(color=PALETTE["mark"], strokeDash=[6, 3], strokeWidth=1.5).encode(y=alt.Y("limit:Q"))
    label = lim.mark_text(align="left", dx=4, dy=-6, color=PALETTE["mark"]).encode(
        y=alt.Y("limit:Q"), x=alt.XValue(0), text=alt.Text("label:N"))
    return alt.layer(lines, rule, label).properties(
        width=width, height=height, title="Robustness across the range (Ms at or under the limit)")


def schedule_rows(verdict: Mapping[str, Any]) -> list[dict]:
    """Step-chart vertices (level, kc) of the schedule: each band held from its start."""
    sched = [s for s in verdict.get("schedule") or [] if _number(s.get("kc")) is not None]
    sched.sort(key=lambda s: _number(s.get("level")) or 0.0)
    rows: list[dict] = []
    for k, s in enumerate(sched):
        level = _number(s.get("level"))
        start = _number(s.get("level_from"))
        if start is None:
            prev = _number(sched[k - 1].get("level")) if k else None
            start = level if prev is None or level is None else (prev + level) / 2
        rows.append({"level": start, "kc": _number(s["kc"]), "tested": level})
    if sched:
        last = sched[-1]
        end = _number(last.get("level_to"))
        end = _number(last.get("level")) if end is None else end
        rows.append({"level": end, "kc": _number(last["kc"]), "tested": None})
    return rows


def schedule_chart(verdict: Mapping[str, Any], *, units: Mapping[str, str] | None = None,
                   width: int = 400, height: int = 220) -> alt.LayerChart:
    """The gain schedule as a step chart of controller gain against level.

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
    unit_in, unit_out = _units(units)
    rows = schedule_rows(verdict)
    y = alt.Y("kc:Q", title=f"controller gain Kc ({unit_in}/{unit_out})",
              scale=alt.Scale(zero=False, padding=12))
    x = alt.X("level:Q", title=f"operating level ({unit_out})", scale=alt.Scale(zero=False))
    data = alt.Chart({"values": rows})
    layers = [data.mark_line(interpolate="step-after", color=PALETTE["schedule"], strokeWidth=2).encode(
        x=x, y=y)]
    tested = [r for r in rows if r["tested"] is not None]
    layers.append(alt.Chart({"values": tested}).mark_point(
        color=PALETTE["schedule"], filled=True, size=50).encode(
        x=alt.X("tested:Q", title=f"operating level ({unit_out})"), y=y, tooltip=_tips("tested:Q", "kc:Q")))
    single = _number((verdict.get("controller") or {}).get("kc"))
    if single is not None:
        layers.append(alt.Chart({"values": [{"kc": single, "label": "single controller"}]})
                      .mark_rule(color=PALETTE["single"], strokeDash=[6, 3]).encode(
                          y=alt.Y("kc:Q"), tooltip=_tips("label:N", "kc:Q")))
        layers.append(alt.Chart({"values": [{"kc": single, "label": "single controller"}]})
                      .mark_text(align="left", dx=4, dy=-6, color=PALETTE["single"]).encode(
                          y=alt.Y("kc:Q"), x=alt.XValue(0), text=alt.Text("label:N")))
    return alt.layer(*layers).properties(width=width, height=height,
                                         title="Gain schedule: controller gain against level")


#: Vega-Lite version the specs are written for (e.g. "v6.4.1"); report.py bundles the
#: matching JavaScript so the HTML needs no network.
VEGA_LITE_VERSION: str = alt.SCHEMA_VERSION
