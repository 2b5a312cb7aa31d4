"""Data shaping for the charts: plain numbers and rows, no altair.

Everything here turns the inputs of a chart (a params row, sample arrays, the verdict
dict) into JSON-safe rows and small records; the chart modules beside it only describe
how the rows are drawn. Kept apart so the shaping can be tested, and reused (the report
streams overlay rows itself), without building a Vega-Lite specification.

Conventions
-----------
* Per-test samples are decimated (min/max per bucket, so spikes survive) to about
  :data:`POINTS_PER_TEST` points, and numbers are rounded to six significant digits,
  so a report of a hundred tests stays a few megabytes.
* Every number is a float or None: NaN and infinity become None, since the browser's
  ``JSON.parse`` rejects them.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from mapper.signals import step_time

#: Target number of samples kept per test in a chart.
POINTS_PER_TEST = 300

#: Fraction of the final change at one time constant after the response starts.
FRACTION_AT_TIME_CONSTANT = 1.0 - math.exp(-1.0)  # 0.632...

#: Parameters drawn on the operating map, in panel order.
MAP_PARAMETERS = ("gain", "time_constant", "dead_time", "gain_over_time_constant")


# --------------------------------------------------------------------------- values
def units_of(units: Mapping[str, str] | None) -> tuple[str, str]:
    """(input unit, output unit), with a plain stand-in where a unit is missing."""
    units = units or {}
    return str(units.get("input") or "input units"), str(units.get("output") or "output units")


def number(value: Any) -> float | None:
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


def short(value: Any) -> float | None:
    """Like :func:`number` with four significant digits."""
    x = number(value)
    return None if x is None else float(f"{x:.4g}")


def text(value: Any) -> str:
    """The value as text, None as the empty string."""
    return "" if value is None else str(value)


def flag_list(value: Any) -> list[str]:
    """Flag names from a list, a single name or None."""
    if value is None:
        return []
    if isinstance(value, str):
        return [value] if value else []
    try:
        return [str(f) for f in value]
    except TypeError:
        return [str(value)]


def fmt(value: Any) -> str:
    """Four significant digits, or "?" when there is no number."""
    x = number(value)
    return "?" if x is None else f"{x:.4g}"


# ------------------------------------------------------------------------ samples
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


def settled_change(t: np.ndarray, y: np.ndarray, step_time: float) -> tuple[float, float]:
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
    fitted: Any = items[4] if len(items) > 4 else row.get("fitted")
    step = items[5] if len(items) > 5 else row.get("step_time")
    if hasattr(fitted, "fitted"):  # an identification result: ask it for its output
        step = getattr(fitted, "step_time", None) if step is None else step
        fitted = fitted.fitted(t, u)
    return row, t, u, y, fitted, step


# --------------------------------------------------------------------- operating map
def map_points(params: pd.DataFrame | None) -> list[dict]:
    """Long rows ``test_id, level, direction, quality, parameter, value, lo, hi``.

    Rejected and excluded tests and tests without a level are left out; gain over time constant gets
    an interval from the ends of the two intervals (conservative: it ignores the
    correlation of gain and time constant).
    """
    rows: list[dict] = []
    if params is None or len(params) == 0:
        return rows
    for rec in params.to_dict("records"):
        if rec.get("quality") == "rejected" or rec.get("excluded") is True:
            continue
        base = {
            "test_id": text(rec.get("test_id")),
            "level": number(rec.get("level")),
            "direction": text(rec.get("direction")),
            "quality": text(rec.get("quality")),
        }
        if base["level"] is None:
            continue
        for name in ("gain", "time_constant", "dead_time"):
            value = number(rec.get(name))
            if value is None:
                continue
            rows.append({**base, "parameter": name, "value": value,
                         "lo": number(rec.get(f"{name}_lo")), "hi": number(rec.get(f"{name}_hi"))})
        gain, tau = number(rec.get("gain")), number(rec.get("time_constant"))
        if gain is not None and tau:
            g_lo, g_hi = number(rec.get("gain_lo")), number(rec.get("gain_hi"))
            t_lo, t_hi = number(rec.get("time_constant_lo")), number(rec.get("time_constant_hi"))
            lo = hi = None
            if g_lo is not None and g_hi is not None and t_lo and t_hi and t_lo > 0 and t_hi > 0:
                ends = [g_lo / t_lo, g_lo / t_hi, g_hi / t_lo, g_hi / t_hi]
                lo, hi = number(min(ends)), number(max(ends))
            rows.append({**base, "parameter": "gain_over_time_constant", "value": number(gain / tau),
                         "lo": lo, "hi": hi})
    return rows


def trend_rows(trend: pd.DataFrame | None, parameter: str) -> list[dict]:
    """Rows ``level, value, lo, hi`` of one parameter's trend and 95 % band."""
    if trend is None or len(trend) == 0:
        return []
    part = trend[trend["parameter"] == parameter]
    return [{"level": number(r["level"]), "value": number(r["value"]),
             "lo": number(r.get("lo")), "hi": number(r.get("hi"))}
            for r in part.to_dict("records")]


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
        As for :func:`mapper.presentation.charts.overlay_chart`.
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
    step = number(step)
    if step is None:
        step = step_time_from_input(t, u)
    if step is None or len(t) < 3:
        return None
    y0, change = settled_change(t, y, step)
    if not math.isfinite(change) or abs(change) < 1e-12:
        return None
    elapsed = t - step
    if scale_time:
        tau = number(row.get("time_constant"))
        if not tau or tau <= 0:
            return None
        elapsed = elapsed / tau
    response = (y - y0) / change
    idx = decimate(elapsed, response, points)
    return OverlaySeries(text(row.get("test_id")), text(row.get("quality")),
                         text(row.get("direction")), number(row.get("level")),
                         elapsed[idx].copy(), response[idx].copy())


def overlay_rows(series: Iterable[OverlaySeries]) -> Iterator[dict]:
    """Data rows of the overlay, one per kept sample, made on demand."""
    for s in series:
        # four significant digits are plenty for a shape comparison and halve the bytes
        for e, r in zip(s.elapsed.tolist(), s.response.tolist()):
            yield {"test_id": s.test_id, "elapsed": short(e), "response": short(r)}


def overlay_meta(series: Iterable[OverlaySeries]) -> list[dict]:
    """One row per test: ``test_id, quality, direction, level`` (looked up by the chart)."""
    return [{"test_id": s.test_id, "quality": s.quality, "direction": s.direction,
             "level": s.level} for s in series]


# ---------------------------------------------------------------------- one test
@dataclass(frozen=True)
class StepParts:
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


def step_parts(row: Mapping[str, Any], t: Sequence[float], u: Sequence[float],
               y: Sequence[float], fitted: Sequence[float] | None, step_time: float | None,
               units: Mapping[str, str] | None, points: int) -> StepParts:
    """Rows, title and marks of one test's chart (see ``step_test_chart``)."""
    unit_in, unit_out = units_of(units)
    ta = np.asarray(t, dtype=float)
    ua = np.asarray(u, dtype=float)
    ya = np.asarray(y, dtype=float)
    fit = None if fitted is None else np.asarray(fitted, dtype=float)
    if fit is not None and fit.shape != ya.shape:
        fit = None
    step = number(step_time)
    if step is None:
        step = step_time_from_input(ta, ua)
    idx = decimate(ta, ya, points)
    ts, us, ys = ta[idx].tolist(), ua[idx].tolist(), ya[idx].tolist()
    if fit is None:
        rows = [{"t": number(a), "y": number(b), "u": number(c)} for a, b, c in zip(ts, ys, us)]
    else:
        fs = fit[idx].tolist()
        rows = [{"t": number(a), "y": number(b), "u": number(c), "fitted": number(f),
                 "residual": number(b - f)} for a, b, c, f in zip(ts, ys, us, fs)]
    model_line = fit is not None and bool(np.any(np.isfinite(fit)))
    quality = text(row.get("quality")) or "unjudged"
    flags = flag_list(row.get("flags"))
    return StepParts(
        rows=rows,
        title=step_title(row, unit_out),
        subtitle=f"quality: {quality}" + (f"; flags: {', '.join(flags)}" if flags else ""),
        marks=model_marks(row, ta, fit, step) if fit is not None and model_line else None,
        step=step, residuals=fit is not None, model_line=model_line,
        unit_in=unit_in, unit_out=unit_out)


def step_title(row: Mapping[str, Any], unit_out: str) -> str:
    """Title of one test's chart: its name, level and step direction."""
    return (f"{text(row.get('test_id'))}: level {fmt(row.get('level'))} {unit_out}, "
            f"{text(row.get('direction'))} step")


def model_marks(row: Mapping[str, Any], t: np.ndarray, fit: np.ndarray,
                step: float | None) -> dict | None:
    """End of the dead time and the 63.2 % point of the model, or None without a model.

    The 63.2 % point sits one time constant after the response starts, i.e. at
    step time + dead time + time constant, at 1 - e^-1 of the model's change
    (graphical method, common practice in the trade).
    """
    gain, tau, theta = (number(row.get(k)) for k in ("gain", "time_constant", "dead_time"))
    input_step = number(row.get("input_step"))
    if step is None or gain is None or tau is None or theta is None or input_step is None:
        return None
    before = fit[(t <= step) & np.isfinite(fit)]
    y0 = float(before[-1]) if len(before) else float(np.nanmean(fit[:1]))
    return {"dead_time_end": number(step + theta), "t63": number(step + theta + tau),
            "y63": number(y0 + FRACTION_AT_TIME_CONSTANT * gain * input_step)}


# ------------------------------------------------------------------ verdict charts
def margins_rows(verdict: Mapping[str, Any]) -> list[dict]:
    """Rows ``controller, level, ms`` for the single controller and the schedule."""
    rows = [{"controller": "single", "level": number(p.get("level")), "ms": number(p.get("ms"))}
            for p in verdict.get("points") or []]
    rows += [{"controller": "schedule", "level": number(p.get("level")), "ms": number(p.get("ms"))}
             for p in verdict.get("schedule_points") or []]
    return rows


def schedule_is_interpolated(verdict: Mapping[str, Any]) -> bool:
    """True when the schedule rows are interpolation nodes (rows carry ``band``)."""
    return any("band" in s for s in verdict.get("schedule") or [])


def schedule_rows(verdict: Mapping[str, Any]) -> list[dict]:
    """Chart vertices (level, kc) of the schedule.

    Rows that are interpolation nodes (with ``band``) give the schedule as applied: held from the
    start of the range to the first node, linear between nodes, held after the last. Otherwise each
    band is held from its start (a step chart).
    """
    sched = [s for s in verdict.get("schedule") or [] if number(s.get("kc")) is not None]
    sched.sort(key=lambda s: number(s.get("level")) or 0.0)
    rows: list[dict] = []
    if sched and schedule_is_interpolated(verdict):
        first, last = sched[0], sched[-1]
        start, end = number(first.get("level_from")), number(last.get("level_to"))
        if start is not None:
            rows.append({"level": start, "kc": number(first["kc"]), "tested": None})
        rows += [{"level": number(s.get("level")), "kc": number(s["kc"]), "tested": number(s.get("level"))}
                 for s in sched]
        if end is not None:
            rows.append({"level": end, "kc": number(last["kc"]), "tested": None})
        return rows
    for k, s in enumerate(sched):
        level = number(s.get("level"))
        start = number(s.get("level_from"))
        if start is None:
            prev = number(sched[k - 1].get("level")) if k else None
            start = level if prev is None or level is None else (prev + level) / 2
        rows.append({"level": start, "kc": number(s["kc"]), "tested": level})
    if sched:
        last = sched[-1]
        end = number(last.get("level_to"))
        end = number(last.get("level")) if end is None else end
        rows.append({"level": end, "kc": number(last["kc"]), "tested": None})
    return rows
