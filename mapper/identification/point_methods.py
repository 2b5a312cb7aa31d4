"""Point estimators of a FOPDT model from one step test.

Point methods read times off the normalised step response (graphical 63.2 %,
two-point after Smith or Sundaresan & Krishnaswamy, area). Each returns a plain
:class:`Estimate`, the raw record every estimator of the layer returns (the
least-squares fit in :mod:`mapper.identification.least_squares` too);
:mod:`mapper.identification.identify` turns it into a
:class:`~mapper.identification.identify.FitResult`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mapper.identification.quality import StepInfo

__all__ = [
    "Estimate",
    "StepShape",
    "two_point_coefficients",
    "step_shape",
    "graphical",
    "two_point",
    "smith",
    "sundaresan",
    "area",
]


@dataclass(frozen=True)
class Estimate:
    """Raw estimate in seconds (``time_constant`` None for the integrating model);
    ``start_state`` is the starting free response (see :mod:`~mapper.identification.nonsteady`)."""

    model: str
    gain: float
    time_constant: float | None
    dead_time: float
    offset: float
    rss: float = float("nan")
    at_bound: bool = False
    converged: bool = True
    start_state: float = 0.0


# --- point methods ---------------------------------------------------------------------


def two_point_coefficients(p1: float, p2: float) -> tuple[float, float, float]:
    """Exact coefficients of a two-point FOPDT method.

    With ``x = -ln(1 - p)`` the FOPDT step response reaches fraction ``p`` at
    ``t = theta + x tau``, so ``tau = c_tau (t2 - t1)`` and ``theta = c1 t1 - c2 t2``.

    Returns
    -------
    c_tau, c1, c2 : float
        ``1/(x2 - x1)``, ``x2/(x2 - x1)`` and ``x1/(x2 - x1)``.

    Notes
    -----
    Smith (1972) uses 28.3 % and 63.2 % (``c_tau`` = 1.5); Sundaresan & Krishnaswamy
    (1978) use 35.3 % and 85.3 % and publish the rounded 0.67, 1.3 and 0.29.
    """
    x1, x2 = -math.log1p(-p1), -math.log1p(-p2)
    return 1.0 / (x2 - x1), x2 / (x2 - x1), x1 / (x2 - x1)


@dataclass(frozen=True)
class StepShape:
    """Normalised step response ``s`` (0 before, 1 settled) from the effective step time."""

    t: np.ndarray  # seconds since the effective step instant (>= first sample at/after it)
    s: np.ndarray  # smoothed normalised response
    raw: np.ndarray  # unsmoothed normalised response
    y_before: float
    y_after: float
    noise: float  # noise sd in normalised units


def step_shape(t: np.ndarray, y: np.ndarray, step: StepInfo, noise_sd: float) -> StepShape:
    """Baseline, settled end and normalised response of a step test.

    The baseline is the mean output before the input moved; the settled value is the
    mean of the last tenth of the record (at least three samples).
    """
    n = y.size
    i0 = max(step.index, 1)
    y_before = float(y[:i0].sum()) / i0
    tail = min(max(3, n // 10), n)
    y_after = float(y[-tail:].sum()) / tail
    change = y_after - y_before
    if change == 0.0:
        change = 1e-300
    k = int(np.searchsorted(t, step.effective_time - 1e-9 * (t[1] - t[0])))
    k = max(min(k, n - 1), 0)
    raw = (y[k:] - y_before) / change
    s = raw
    if noise_sd > 1e-3 * abs(change) and raw.size > 10:  # light centred 5-point average
        padded = np.empty(raw.size + 5)
        padded[:3], padded[3:-2], padded[-2:] = raw[0], raw, raw[-1]
        c = np.cumsum(padded)
        s = (c[5:] - c[:-5]) / 5.0
    return StepShape(t[k:] - step.effective_time, s, raw, y_before, y_after, noise_sd / abs(change))


def _crossing(shape: StepShape, p: float) -> float:
    """First time the normalised response reaches ``p`` (linear interpolation)."""
    hits = np.flatnonzero(shape.s >= p)
    if hits.size == 0:
        return float("nan")
    k = int(hits[0])
    if k == 0:
        return float(shape.t[0])
    s0, s1 = shape.s[k - 1], shape.s[k]
    return float(shape.t[k - 1] + (p - s0) / (s1 - s0) * (shape.t[k] - shape.t[k - 1]))


def _result(shape: StepShape, step: StepInfo, tau: float, theta: float) -> Estimate:
    gain = (shape.y_after - shape.y_before) / step.size
    ok = np.isfinite(tau) and np.isfinite(theta) and tau > 0
    wrong_way = np.isfinite(tau) and np.isfinite(theta) and tau <= 0  # kept as a finite dead time
    return Estimate(
        "fopdt",
        gain,
        float(tau) if ok else None,
        float(max(theta, 0.0)) if ok or wrong_way else float("nan"),
        shape.y_before,
        converged=bool(ok),
    )


def graphical(shape: StepShape, step: StepInfo) -> Estimate:
    """Graphical 63.2 % method.

    Notes
    -----
    Gain = change in output / change in input; dead time from the input change to the
    first sustained output move (leaving a band of three noise sd or 1 % of the
    change); time constant from that moment to 63.2 % of the change. The traditional
    hand method of process-control texts (e.g. Seborg, Edgar & Mellichamp, *Process
    Dynamics and Control*); it reads the time constant about 1 % short on exact data.
    """
    band = max(3.0 * shape.noise, 0.01)
    t63 = _crossing(shape, 1.0 - math.exp(-1.0))
    below = np.flatnonzero((shape.s < band) & (shape.t < t63))
    if below.size and below[-1] + 1 < shape.s.size:
        k = below[-1] + 1
        s0, s1 = shape.s[k - 1], shape.s[k]
        t_move = shape.t[k - 1] + (band - s0) / (s1 - s0) * (shape.t[k] - shape.t[k - 1])
    else:
        t_move = float(shape.t[0])
    return _result(shape, step, t63 - t_move, t_move)


def two_point(shape: StepShape, step: StepInfo, p1: float, p2: float) -> Estimate:
    """Two-point method with exact coefficients (see :func:`two_point_coefficients`)."""
    c_tau, c1, c2 = two_point_coefficients(p1, p2)
    t1, t2 = _crossing(shape, p1), _crossing(shape, p2)
    return _result(shape, step, c_tau * (t2 - t1), c1 * t1 - c2 * t2)


def smith(shape: StepShape, step: StepInfo) -> Estimate:
    """Smith (1972) two-point method at 28.3 % and 63.2 % of the change."""
    return two_point(shape, step, 0.283, 0.632)


def sundaresan(shape: StepShape, step: StepInfo) -> Estimate:
    """Sundaresan & Krishnaswamy (1978) two-point method at 35.3 % and 85.3 %."""
    return two_point(shape, step, 0.353, 0.853)


def area(shape: StepShape, step: StepInfo) -> Estimate:
    """Area method of Åström & Hägglund (1995).

    Notes
    -----
    ``A0 = integral of (1 - s) dt = theta + tau`` over the whole response and
    ``A1 = integral of s dt`` from the step to ``A0`` equals ``tau / e``, so
    ``tau = e A1`` and ``theta = A0 - tau`` (Åström & Hägglund, *PID Controllers:
    Theory, Design and Tuning*, 1995). Integrals average the noise away.
    """
    t, s = shape.t, shape.raw
    t_full = np.concatenate([[0.0], t]) if t[0] > 0 else t
    s_full = np.concatenate([[0.0], s]) if t[0] > 0 else s
    a0 = float(np.trapezoid(1.0 - s_full, t_full))
    mask = t_full <= a0
    if a0 <= 0 or mask.sum() < 2:
        return _result(shape, step, float("nan"), float("nan"))
    tm, sm = t_full[mask], s_full[mask]
    a1 = float(np.trapezoid(sm, tm))
    if tm[-1] < a0 and mask.sum() < t_full.size:  # close the last partial interval
        k = int(mask.sum())
        s_end = np.interp(a0, t_full[k - 1 : k + 1], s_full[k - 1 : k + 1])
        a1 += 0.5 * (sm[-1] + s_end) * (a0 - tm[-1])
    tau = math.e * a1
    return _result(shape, step, tau, a0 - tau)
