"""Judging a step test: where the input moved, and whether the test can be trusted.

This module owns step finding (:func:`find_step`), robust noise estimates and the test
checks that turn a test into ``good``, ``suspect`` or ``rejected`` with short snake_case
flags and one sentence per flag. It does no model fitting; :mod:`mapper.identification.identify` calls
:func:`assess` with the fitted model.

The thresholds below are rules of thumb of the trade ("common practice"), not published
limits; they are module constants so a site can see and argue with them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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
    MIN_RESPONSE_NOISE_BANDS,
    MIN_SAMPLES_PER_TIME_CONSTANT,
    MISFIT_FRACTION,
    MOVE_FRACTION,
    NOISE_BAND_SDS,
    QUANTUM_LEVELS,
    SETTLE_TIME_CONSTANTS,
)

@dataclass(frozen=True)
class StepInfo:
    """Where and how the input moved in a test.

    Attributes
    ----------
    time : float
        Time (s) at which the main input move started; NaN if none was found.
    size : float
        ``u_after - u_before`` (input units); 0.0 if no move.
    u_before, u_after : float
        Settled input before and after the main move.
    ramp_duration : float
        Duration (s) of the move; 0.0 for a clean step.
    n_moves : int
        Number of distinct input moves of at least 10 % of the main one.
    index : int
        First sample at which the input has left ``u_before`` (``len(u)`` if none).
    effective_time : float
        Centroid in time of the input change: the instant of an ideal step with the
        same first moment, used by the point methods for ramps.
    """

    time: float
    size: float
    u_before: float
    u_after: float
    ramp_duration: float
    n_moves: int
    index: int
    effective_time: float

    @property
    def found(self) -> bool:
        return self.n_moves > 0 and self.size != 0.0


def median(x: np.ndarray) -> float:
    """Median by partial sort (np.median's checks cost more than the sort on short data)."""
    k = x.size // 2
    if x.size % 2:
        return float(np.partition(x, k)[k])
    part = np.partition(x, (k - 1, k))
    return 0.5 * float(part[k - 1] + part[k])


def standard_deviation(x: np.ndarray) -> float:
    """Population standard deviation (``numpy.std`` without its per-call overhead)."""
    if x.size == 0:
        return float("nan")
    xc = x - x.sum() / x.size
    return math.sqrt(float(xc @ xc) / x.size)


def noise_sd(x: np.ndarray) -> float:
    """Robust standard deviation of the sample-to-sample noise of a signal.

    Notes
    -----
    Median absolute deviation of the first differences, scaled by 1.4826 / sqrt(2)
    (Hampel, 1974); steps and slow trends do not inflate it. For strongly
    autocorrelated noise it underestimates the marginal spread, so model residuals
    are preferred when a model is available.
    """
    x = np.asarray(x, dtype=float)
    if x.size < 3:
        return 0.0
    dx = np.diff(x)
    if 2 * np.count_nonzero(dx) < dx.size:  # more than half the steps are exactly zero
        return 0.0
    return 1.4826 * median(np.abs(dx - median(dx))) / np.sqrt(2.0)


def _no_step(n: int, u: np.ndarray) -> StepInfo:
    level = median(u) if n else float("nan")
    return StepInfo(float("nan"), 0.0, level, level, 0.0, 0, n, float("nan"))


def find_step(t: np.ndarray, u: np.ndarray) -> StepInfo:
    """Find the main input move of a test, its size and the number of moves.

    Parameters
    ----------
    t : ndarray
        Sample times (s), uniform grid.
    u : ndarray
        Input samples.

    Returns
    -------
    StepInfo
        ``n_moves == 0`` and ``size == 0.0`` when the input does not move clearly.

    Notes
    -----
    A moving-window difference of means (``w`` samples after minus ``w`` before)
    marks the regions where the input changes by more than six times its noise; each
    region's size is the difference of the medians just outside it. The start and
    length of the main move come from its 10 % and 90 % crossings, so clean steps and
    short actuator ramps are both handled.
    """
    t = np.asarray(t, dtype=float)
    u = np.asarray(u, dtype=float)
    n = u.size
    if n < 6 or not np.all(np.isfinite(u)):
        return _no_step(n, u)
    scale = max(float(np.max(np.abs(u))), 1e-300)
    dx = np.diff(u)
    moving = np.flatnonzero(np.abs(dx) > 1e-9 * scale)
    if 2 * moving.size < dx.size:
        return _set_point_step(t, u, dx, moving)
    w = int(np.clip(n // 20, 2, 10))
    sigma = noise_sd(u)
    # edge padding lets the window reach moves in the first and last samples
    padded = np.concatenate([np.full(w, u[0]), u, np.full(w, u[-1])]) - u[0]
    csum = np.concatenate([[0.0], np.cumsum(padded)])
    ks = np.arange(0, n - 1)
    kp = ks + w
    diff_means = (csum[kp + 1 + w] - 2 * csum[kp + 1] + csum[kp + 1 - w]) / w
    threshold = max(6.0 * sigma * np.sqrt(2.0 / w), 1e-9 * scale)
    above = np.abs(diff_means) > threshold
    if not above.any():
        return _no_step(n, u)
    edges = np.flatnonzero(np.diff(np.concatenate([[0], above.astype(int), [0]])))
    regions = [(ks[s], ks[e - 1]) for s, e in zip(edges[::2], edges[1::2])]
    moves = []  # (first index, last index, before level, after level)
    for i, (k0, k1) in enumerate(regions):
        lo = max(regions[i - 1][1] + 1 if i else 0, k0 - w + 1)
        hi = min(regions[i + 1][0] + 1 if i + 1 < len(regions) else n, k1 + w + 1)
        before = median(u[lo : k0 + 1])
        after = median(u[k1 + 1 : hi]) if hi > k1 + 1 else float(u[-1])
        moves.append((k0, k1, before, after))
    sizes = np.array([m[3] - m[2] for m in moves])
    biggest = float(np.max(np.abs(sizes)))
    level_noise = 6.0 * sigma
    keep = [m for m, s in zip(moves, sizes) if abs(s) >= max(MOVE_FRACTION * biggest, level_noise) and s != 0]
    if not keep:
        return _no_step(n, u)
    j = next(i for i, m in enumerate(keep) if abs(m[3] - m[2]) >= 0.9 * biggest)
    k0, k1 = keep[j][0], keep[j][1]
    # levels from the whole steady stretches on either side of the main move
    lo = keep[j - 1][1] + 1 if j > 0 else 0
    hi = keep[j + 1][0] + 1 if j + 1 < len(keep) else n
    before = median(u[lo : k0 + 1])
    after = median(u[k1 + 1 : hi])
    size = after - before
    sign = np.sign(size)
    p_lo = float(np.clip(4.0 * sigma / abs(size), 0.1, 0.4))
    seg = slice(max(k0 - w + 1, 0), min(k1 + w + 1, n))
    frac = (u[seg] - before) * sign / abs(size)
    i_lo = seg.start + int(np.argmax(frac >= p_lo))
    i_hi = seg.start + int(np.argmax(frac >= 1.0 - p_lo))
    if i_hi < i_lo:
        i_hi = i_lo
    period = median(np.diff(t))
    duration = (t[i_hi] - t[i_lo]) / (1.0 - 2.0 * p_lo)
    start = t[i_lo] - p_lo * duration
    if i_hi == i_lo:  # a clean step between two samples
        duration, start = 0.0, float(t[i_lo])
    index = int(np.searchsorted(t, start - 1e-9 * period))
    # centroid of the input increments, each applied at its sample instant (ZOH)
    lo_c = max(index - 1, 1)
    hi_c = min(i_hi + 2, n)
    inc = np.diff(u[lo_c - 1 : hi_c])
    tot = float(inc.sum())
    eff = float(np.dot(t[lo_c:hi_c], inc) / tot) if tot * sign > 0.5 * abs(size) else start
    return StepInfo(
        time=float(start),
        size=float(size),
        u_before=before,
        u_after=after,
        ramp_duration=float(max(duration, 0.0)),
        n_moves=len(keep),
        index=index,
        effective_time=eff,
    )


def _set_point_step(t: np.ndarray, u: np.ndarray, dx: np.ndarray, moving: np.ndarray) -> StepInfo:
    """Exact moves of a noise-free (set-point) input: runs of consecutive changes."""
    n = u.size
    if moving.size == 0:
        return _no_step(n, u)
    breaks = np.flatnonzero(np.diff(moving) > 1)
    first = moving[np.concatenate([[0], breaks + 1])]  # last sample before each move
    last = moving[np.concatenate([breaks, [moving.size - 1]])] + 1  # first sample after
    sizes = u[last] - u[first]
    biggest = float(np.max(np.abs(sizes)))
    keep = np.flatnonzero((np.abs(sizes) >= MOVE_FRACTION * biggest) & (sizes != 0))
    if keep.size == 0:
        return _no_step(n, u)
    j = int(keep[np.argmax(np.abs(sizes[keep]) >= 0.9 * biggest)])
    k_a, k_b = int(first[j]), int(last[j])
    inc = dx[k_a:k_b]
    effective = float(np.dot(t[k_a + 1 : k_b + 1], inc) / inc.sum()) if inc.sum() else float(t[k_a + 1])
    return StepInfo(
        time=float(t[k_a + 1]),
        size=float(sizes[j]),
        u_before=float(u[k_a]),
        u_after=float(u[k_b]),
        ramp_duration=float(t[k_b] - t[k_a + 1]),
        n_moves=int(keep.size),
        index=k_a + 1,
        effective_time=effective,
    )


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

    Returns
    -------
    list of str
        Flags in a fixed order; see :mod:`mapper.identification.flags`.

    Notes
    -----
    All limits are common practice, not published rules: settled means the record
    runs past dead time + 4 time constants after the step; the response should be at
    least 5 noise bands (a band is 4 sd of the residual); at least 10 samples per
    time constant; pre-step drift carried over the test under 10 % of the response.
    """
    flags: list[str] = []
    if period is None:
        period = median(np.diff(t))
    t_end = float(t[-1])
    sigma = standard_deviation(residuals) if residuals is not None and residuals.size else noise_sd(y)
    band = NOISE_BAND_SDS * sigma
    i0 = step.index
    # drift before the step: slope of a straight line through the baseline
    if i0 >= 2 * MIN_BASELINE_SAMPLES and abs(response) > 0:
        tb = t[:i0] - t[:i0].mean()
        yb = y[:i0] - y[:i0].mean()
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
    if band > 0 and abs(response) < MIN_RESPONSE_NOISE_BANDS * band:
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
