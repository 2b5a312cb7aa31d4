"""Judging a step test: where the input moved, and whether the test can be trusted.

This module owns the test checks that turn a test into ``good``, ``suspect`` or
``rejected`` with short snake_case flags and one sentence per flag. Step finding and the
noise estimate live in :mod:`mapper.signals` (``find_step``, ``median`` and ``noise_sd``
are imported here for the callers that still reach them through this module). It does
no model fitting; :mod:`mapper.identification.identify` calls :func:`assess` with the
fitted model.

The thresholds below are rules of thumb of the trade ("common practice"), not published
limits; they are module constants so a site can see and argue with them.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "StepInfo",
    "median",
    "find_step",
    "noise_sd",
    "assess",
]

from mapper.constants import (
    CLIP_SPAN_FRACTION,
    DRIFT_FRACTION,
    MIN_BASELINE_SAMPLES,
    MIN_RESPONSE_SIGNAL_TO_NOISE,
    MIN_SAMPLES_PER_TIME_CONSTANT,
    MISFIT_FRACTION,
    QUANTUM_LEVELS,
    SETTLE_TIME_CONSTANTS,
)
from mapper.signals import StepInfo, find_step, median, noise_sd  # call-through: use mapper.signals


def standard_deviation(x: np.ndarray) -> float:
    """Population standard deviation (``numpy.std`` without its per-call overhead)."""
    if x.size == 0:
        return float("nan")
    xc = x - x.sum() / x.size
    return math.sqrt(float(xc @ xc) / x.size)


# --- checks -------------------------------------------------------------------------


def _at_limit(x: np.ndarray, limits) -> bool:
    if limits is None:
        return False
    lo, hi = float(limits[0]), float(limits[1])
    tol = CLIP_SPAN_FRACTION * abs(hi - lo)
    return bool(np.sum((x <= lo + tol) | (x >= hi - tol)) >= 2)


def _flat_topped(x: np.ndarray) -> bool:
    """Runs of identical samples at the extreme of an otherwise noisy signal."""
    if x.size < 20:
        return False
    span = float(np.max(x) - np.min(x))
    for extreme in (np.max(x), np.min(x)):
        at = x == extreme
        if np.count_nonzero(at) >= max(5, 0.02 * x.size):
            rest = x[~at]
            # second differences: smooth (noise-free) curves give almost none
            if rest.size > 10 and _second_difference_sd(rest) > 1e-3 * span:
                return True
    return False


def _second_difference_sd(x: np.ndarray) -> float:
    d2 = np.diff(x, 2)
    return 1.4826 * median(np.abs(d2 - median(d2))) / np.sqrt(6.0)


def _distinct_count(sorted_x: np.ndarray) -> int:
    return 1 + int(np.count_nonzero(sorted_x[1:] != sorted_x[:-1])) if sorted_x.size else 0


def _distinct_share(x: np.ndarray) -> float:
    return _distinct_count(np.sort(x)) / max(x.size, 1)


def _quantised(y: np.ndarray, response: float) -> bool:
    ys = np.sort(y)
    count = _distinct_count(ys)
    if count < 2 or count > y.size / 4:
        return False
    levels = ys[np.concatenate(([True], ys[1:] != ys[:-1]))]
    quantum = median(np.diff(levels))
    return quantum > 0 and abs(response) / quantum < QUANTUM_LEVELS


def _moving_average(x: np.ndarray, width: int) -> np.ndarray:
    width = max(1, min(int(width), x.size))
    c = np.concatenate([[0.0], np.cumsum(x)])
    return (c[width:] - c[:-width]) / width


def assess(
    t: np.ndarray,
    u: np.ndarray,
    y: np.ndarray,
    step: StepInfo,
    *,
    model: str,
    time_constant: float | None,
    dead_time: float | None,
    response: float,
    residuals: np.ndarray | None,
    input_range=None,
    output_range=None,
    period: float | None = None,
    start_state: bool = False,
) -> list[str]:
    """Checks of a step test against the rules of thumb of the trade.

    Parameters
    ----------
    t, u, y : ndarray
        The test on a uniform grid.
    step : StepInfo
        From :func:`find_step`.
    model : str
        ``"fopdt"``, ``"integrating"`` or ``"none"``.
    time_constant, dead_time : float or None
        Fitted values (s).
    response : float
        Output change caused by the step (for an integrating model, the change over
        the record after the step).
    residuals : ndarray or None
        Output minus the fitted model.
    input_range, output_range : (float, float), optional
        Instrument ranges for the clipping checks.
    period : float, optional
        Sample period (s); default the median spacing of ``t``.
    start_state : bool, default False
        The fit estimated the starting state: drift before the step is then judged on
        the residuals (what the starting free response does not explain).

    Returns
    -------
    list of str
        Flags in a fixed order; see :mod:`mapper.identification.flags`.

    Notes
    -----
    All limits are common practice, not published rules: settled means the record
    runs past dead time + 4 time constants after the step; the response should be at
    least 5 residual sd (signal-to-noise ratio 5); at least 10 samples per
    time constant; pre-step drift carried over the test under 10 % of the response.
    """
    flags: list[str] = []
    if period is None:
        period = median(np.diff(t))
    t_end = float(t[-1])
    sigma = standard_deviation(residuals) if residuals is not None and residuals.size else noise_sd(y)
    i0 = step.index
    # drift before the step: slope of a straight line through the baseline
    if i0 >= 2 * MIN_BASELINE_SAMPLES and abs(response) > 0:
        base = residuals if start_state and residuals is not None else y
        tb = t[:i0] - t[:i0].mean()
        yb = base[:i0] - base[:i0].mean()
        stt = float(tb @ tb)
        slope = float(tb @ yb) / stt
        resid = yb - slope * tb
        slope_sd = float(np.sqrt(resid @ resid / max(i0 - 2, 1) / stt))
        carried = abs(slope) * (t_end - step.time)
        if carried > DRIFT_FRACTION * abs(response) and abs(slope) > 3.0 * slope_sd:
            flags.append("drift_before_step")
    if model == "fopdt" and time_constant is not None and dead_time is not None:
        if t_end - step.time < dead_time + SETTLE_TIME_CONSTANTS * time_constant:
            flags.append("not_settled")
    if _at_limit(u, input_range) or (input_range is None and _flat_topped_noisy_input(u)):
        flags.append("input_clipped")
    if _at_limit(y, output_range) or _flat_topped(y):
        flags.append("output_clipped")
    if sigma > 0 and abs(response) < MIN_RESPONSE_SIGNAL_TO_NOISE * sigma:
        flags.append("small_response")
    if step.n_moves > 1:
        flags.append("multiple_input_moves")
    if model == "fopdt" and time_constant is not None:
        if time_constant / period < MIN_SAMPLES_PER_TIME_CONSTANT:
            flags.append("few_samples_per_time_constant")
    if _quantised(y, response):
        flags.append("quantised_output")
    if residuals is not None and abs(response) > 0 and model != "none":
        width = 5
        if time_constant is not None:
            width = int(min(max(0.5 * time_constant / period, 5), max(5, residuals.size // 10)))
        systematic = np.max(np.abs(_moving_average(residuals, width)))
        if systematic > MISFIT_FRACTION * abs(response):
            flags.append("poor_fit")
    return flags


def _flat_topped_noisy_input(u: np.ndarray) -> bool:
    # a stepped set-point is flat by nature; only a noisy (measured) input can show a flat top
    if _distinct_share(u) < 0.5:
        return False
    return _flat_topped(u)
