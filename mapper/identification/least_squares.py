"""Output-error least-squares estimators of FOPDT and integrating models.

The measured input drives the exact zero-order-hold model; offset and gain are
projected out (variable projection) and the time constant and dead time are refined
by Levenberg-Marquardt, with a global check over whole-sample dead times. Each fit
returns a :class:`LeastSquaresFit` carrying the :class:`~mapper.identification.point_methods.Estimate`
with the Jacobian and residuals the uncertainty needs. Internally time is counted in
samples so the numerics do not depend on the time scale.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft

from mapper.constants import MIN_RESPONSE_SAMPLES
from mapper.identification.models import fopdt_unit_response, split_dead_time, unit_response_rows
from mapper.identification.point_methods import Estimate

__all__ = [
    "TAU_MIN_SAMPLES",
    "TAU_MAX_POST_RECORDS",
    "STATISTICAL_TOLERANCE",
    "LeastSquaresFit",
    "least_squares_fopdt",
    "least_squares_integrating",
]


TAU_MIN_SAMPLES = 0.05  # below this the lag is invisible at the sample rate
TAU_MAX_POST_RECORDS = 50.0  # upper bound on tau, in lengths of the record after the step
STATISTICAL_TOLERANCE = 1e-4  # stop when a step moves the estimate under 0.01 sd


@dataclass(frozen=True)
class LeastSquaresFit:
    """Least-squares estimate with what the uncertainty needs.

    ``jacobian`` holds derivatives of the output with respect to (offset, gain,
    time_constant, dead_time) in seconds, or (offset, gain, dead_time) for the
    integrating model.
    """

    estimate: Estimate
    jacobian: np.ndarray
    residuals: np.ndarray
    iterations: int


def _linear_fit(M: np.ndarray, y: np.ndarray) -> tuple[float, float, np.ndarray, float, list]:
    """Offset and gain of ``y = c + K g`` by least squares (the linear part of VP).

    ``M`` holds the rows ``1, g, derivatives...``; the Gram matrix ``M M'`` is returned
    as nested lists because the Levenberg-Marquardt step is built from it too.
    """
    gram = (M @ M.T).tolist()
    h0, h1 = (M[:2] @ y).tolist()
    n, sg, sgg = gram[0][0], gram[0][1], gram[1][1]
    det = n * sgg - sg * sg
    gain = (n * h1 - sg * h0) / det if det > 1e-12 * n * sgg and det > 1e-300 else 0.0
    offset = (h0 - gain * sg) / n
    r = y - gain * M[1]
    r -= offset
    return offset, gain, r, float(r @ r), gram


def _projected_normal(gram: list, gain: float, m: int) -> list:
    """Kaufman's projected normal matrix ``K^2 D'(I - P)D`` from the Gram matrix.

    ``P`` projects on the linear part (ones and ``g``); ``D`` are rows 2.. of ``M``.
    """
    n, sg, sgg = gram[0][0], gram[0][1], gram[1][1]
    det = n * sgg - sg * sg
    k2 = gain * gain
    A = [[0.0] * m for _ in range(m)]
    for i in range(m):
        qi0, qi1 = gram[0][i + 2], gram[1][i + 2]
        for j in range(i, m):
            qj0, qj1 = gram[0][j + 2], gram[1][j + 2]
            proj = (qi0 * (sgg * qj0 - sg * qj1) + qi1 * (n * qj1 - sg * qj0)) / det if det > 0 else 0.0
            A[i][j] = A[j][i] = k2 * (gram[i + 2][j + 2] - proj)
    return A


def _damped_solve(A: list, b: list, lam: float, diag: list) -> list | None:
    """Solve ``(A + lam diag(diag)) x = b`` for one or two unknowns; None if singular."""
    if len(b) == 1:
        den = A[0][0] + lam * diag[0]
        return [b[0] / den] if den != 0 else None
    if len(b) == 2:
        a00, a11, a01 = A[0][0] + lam * diag[0], A[1][1] + lam * diag[1], A[0][1]
        det = a00 * a11 - a01 * a01
        if not det > 1e-300 * abs(a00 * a11) or not math.isfinite(det):
            return None
        return [(a11 * b[0] - a01 * b[1]) / det, (a00 * b[1] - a01 * b[0]) / det]
    try:  # pragma: no cover - the models here have one or two nonlinear parameters
        return np.linalg.solve(np.array(A) + lam * np.diag(diag), np.array(b)).tolist()
    except np.linalg.LinAlgError:
        return None


class _Profile:
    """Residual sum of squares of ``y = c + K g0(k - d)`` for every whole-sample shift d.

    Shifting a zero-dead-time response by d samples is the response with dead time d,
    so one filter run and one FFT correlation give the profile over all dead times.
    """

    def __init__(self, y: np.ndarray, d_max: int) -> None:
        n = self.n = y.size
        self.d_max = d_max = max(int(d_max), 0)
        # linear (not circular) correlation for shifts up to d_max needs n + d_max points
        self.length = sp_fft.next_fast_len(n + d_max + 1, real=True)
        yc = y - y.mean()
        self.syy = float(yc @ yc)
        # correlation with a shifted response as a convolution with the reversed output
        self.reversed_spectrum = sp_fft.rfft(yc[::-1], self.length)
        self.first = n - 1 - d_max

    def rss(self, g0: np.ndarray) -> np.ndarray:
        first, n = self.first, self.n
        conv = sp_fft.irfft(sp_fft.rfft(g0, self.length) * self.reversed_spectrum, self.length)
        corr = conv[first:n][::-1]  # corr[d] = sum_k g0[k] yc[k + d]
        # sums of g0 and g0^2 over the samples that stay inside the record after shift d
        sg = np.cumsum(g0)[first:][::-1]
        sgg = np.cumsum(g0 * g0)[first:][::-1]
        sgg -= sg * sg / n
        ok = sgg > 1e-12 * max(float(sgg.max()), 1e-300)
        explained = np.divide(corr * corr, sgg, out=np.zeros(corr.size), where=ok)
        return self.syy - explained


def _levenberg_marquardt(evaluate, y, p, lower, upper, max_iter=40):
    """Variable-projection Levenberg-Marquardt over the nonlinear parameters ``p``.

    ``evaluate(p)`` returns ``(M, aux)``: ``M`` has rows ones, the unit-gain response
    ``g`` and its derivatives; ``aux`` is handed back with the optimum. The offset and
    gain are solved exactly at every trial point; the step uses the Kaufman (1975)
    approximation of the projected Jacobian, built from the Gram matrix of ``M``.
    Returns ``(p, offset, gain, residuals, rss, M, aux, iterations)``.
    """
    lower, upper = [float(x) for x in lower], [float(x) for x in upper]
    p = [float(x) for x in p]
    m = len(p)
    n_samples = y.size
    y_mean = float(y.mean())
    yc = y - y_mean  # offsets are solved about the mean: no cancellation for large levels
    M, aux = evaluate(p)
    c, K, r, rss, gram = _linear_fit(M, yc)
    lam = 1e-3
    it = 0
    for it in range(1, max_iter + 1):
        A = _projected_normal(gram, K, m)
        b = (K * (M[2:] @ r)).tolist()
        diag = [A[i][i] if A[i][i] > 0 else 1e-12 for i in range(m)]
        accepted = False
        for _ in range(10):
            delta = _damped_solve(A, b, lam, diag)
            if delta is None:
                lam *= 10
                continue
            p_new = [min(max(p[i] + delta[i], lower[i]), upper[i]) for i in range(m)]
            small = all(abs(p_new[i] - p[i]) < 1e-4 for i in range(m))
            predicted = sum(delta[i] * b[i] for i in range(m))
            # converged: the step would lower the RSS by a negligible amount, or (nearly
            # undamped) by under 1e-4 of the noise variance, a move of 0.01 sd at most
            if (predicted <= 1e-10 * rss and small) or (
                lam <= 1e-3 and predicted <= STATISTICAL_TOLERANCE * rss / n_samples
            ):
                return _lm_result(p, c + y_mean, K, r, rss, M, aux, it)
            M_new, aux_new = evaluate(p_new)
            c_new, K_new, r_new, rss_new, gram_new = _linear_fit(M_new, yc)
            if rss_new <= rss:
                accepted = True
                break
            lam *= 10
        if not accepted:
            break
        moved = max(abs(p_new[i] - p[i]) for i in range(m))
        gain_rss = rss - rss_new
        p, M, aux, c, K, r, rss, gram = p_new, M_new, aux_new, c_new, K_new, r_new, rss_new, gram_new
        lam = max(lam / 10, 1e-9)
        if moved < 1e-4 or gain_rss <= 1e-10 * max(rss, 1e-300):
            break
    return _lm_result(p, c + y_mean, K, r, rss, M, aux, it)


def _lm_result(p, c, K, r, rss, M, aux, it):
    return np.array(p), c, K, r, rss, M, aux, it


def least_squares_fopdt(
    period: float,
    v: np.ndarray,
    y: np.ndarray,
    step_index: int,
    start: tuple[float, float] | None = None,
    tau_max: float | None = None,
) -> LeastSquaresFit | None:
    """Output-error least-squares FOPDT fit to the measured input.

    Parameters
    ----------
    period : float
        Sample period T (s).
    v : ndarray
        Input in deviation from its pre-step level.
    y : ndarray
        Output samples.
    step_index : int
        First sample after the input started to move.
    start : (tau, theta), optional
        Point-method estimate in seconds, added to the search.
    tau_max : float, optional
        Upper bound on the time constant in seconds (default 50 records after the step).

    Returns
    -------
    LeastSquaresFit or None
        None when the record leaves nothing to fit.

    Notes
    -----
    Minimises the output error of the exact zero-order-hold model with fractional
    dead time (Ljung, *System Identification*, 1999). Offset and gain enter linearly
    and are projected out (variable projection; Golub & Pereyra, 1973), so only time
    constant and dead time are searched, starting from the point-method estimate (or,
    without one, the best point of a log grid of time constants). Refinement is by
    Levenberg-Marquardt (Marquardt, 1963) in (log tau, theta). Local minima in dead
    time are then ruled out by evaluating, at the refined time constant, the whole
    profile over whole-sample dead times at once (one filter run and one FFT
    correlation) and restarting from its best point if it does better.
    """
    n = y.size
    n_post = n - step_index
    d_max = n_post - MIN_RESPONSE_SAMPLES
    if d_max < 0:
        return None
    tau_hi = TAU_MAX_POST_RECORDS * max(n_post, 1)
    if tau_max is not None:
        tau_hi = max(min(tau_hi, tau_max / period), 2.0 * TAU_MIN_SAMPLES)
    if start is not None and np.isfinite(start[0]) and start[0] > 0:
        taus = []
    else:
        taus = list(np.geomspace(0.3, 3.0 * n_post, 10))
    profile = None

    def best_on_grid(responses):
        nonlocal profile
        if profile is None:
            profile = _Profile(y, d_max)
        best = (np.inf, 1.0, 0)
        for tau, g0 in responses:
            rss = profile.rss(g0)
            d = int(np.argmin(rss))
            if rss[d] < best[0]:
                best = (float(rss[d]), tau, d)
        return best

    def evaluate(p):
        M = np.empty((4, n))
        return M, unit_response_rows(v, math.exp(p[0]), p[1], M)

    lower = [math.log(TAU_MIN_SAMPLES), 0.0]
    upper = [math.log(tau_hi), float(d_max)]
    if start is not None and np.isfinite(start[0]) and start[0] > 0 and np.isfinite(start[1]):
        p0 = [math.log(start[0] / period), start[1] / period]
        p0 = [min(max(x, lo), hi) for x, lo, hi in zip(p0, lower, upper)]
    else:
        grid = (float(np.clip(tau, TAU_MIN_SAMPLES, tau_hi)) for tau in taus)
        best = best_on_grid((tau, fopdt_unit_response(v, 1.0, tau, 0.0)) for tau in grid)
        p0 = [math.log(best[1]), float(best[2])]
    p, c, K, r, rss, M, z, it = _levenberg_marquardt(evaluate, y, p0, lower, upper)
    # global check in dead time at the refined time constant: restart if another
    # whole-sample dead time does better (guards against a local minimum); the
    # zero-delay response comes from the filter run the fit already made
    tau_n = math.exp(p[0])
    check = best_on_grid([(tau_n, _zero_delay_response(z, tau_n))])
    if check[0] < rss * (1.0 - 1e-9):
        p2 = [math.log(check[1]), float(check[2])]
        alt = _levenberg_marquardt(evaluate, y, p2, lower, upper)
        if alt[4] < rss:
            p, c, K, r, rss, M, z, it = alt
    tau_n = math.exp(p[0])
    at_bound = bool(p[0] >= upper[0] - 1e-3 or p[0] <= lower[0] + 1e-3)
    # rows (1, g, dg/dlog tau, dg/dtheta) in samples -> (offset, gain, tau, theta) in seconds
    scale = np.array([1.0, 1.0, K / (tau_n * period), K / period])
    jac = (M * scale[:, None]).T
    est = Estimate(
        "fopdt", K, tau_n * period, float(p[1]) * period, c, rss, at_bound, bool(np.isfinite(rss))
    )
    return LeastSquaresFit(est, jac, r, it)


def _zero_delay_response(z: np.ndarray, time_constant: float) -> np.ndarray:
    """Unit response with no dead time from the double-pole filter output ``z``."""
    a = math.exp(-1.0 / time_constant)
    g0 = np.empty(z.size)
    g0[0] = 0.0
    g0[1:] = z[:-1]
    g0[2:] -= a * z[:-2]
    g0 *= 1.0 - a
    return g0


def least_squares_integrating(
    period: float, v: np.ndarray, y: np.ndarray, step_index: int
) -> LeastSquaresFit | None:
    """Output-error least-squares fit of an integrating-plus-dead-time model.

    Notes
    -----
    ``dy/dt = k' v(t - theta)``: the integrating gain ``k'`` (slope change per input
    change) and the offset are linear and projected out; the dead time is found by the
    same whole-sample profile and Levenberg-Marquardt refinement as the FOPDT fit.
    """
    n = y.size
    d_max = n - step_index - MIN_RESPONSE_SAMPLES
    if d_max < 0:
        return None
    profile = _Profile(y, d_max)
    w = np.cumsum(v)  # the integrator run once; every dead time is a shift of it
    g0 = np.zeros(n)
    g0[1:] = w[:-1]
    d0 = int(np.argmin(profile.rss(g0)))

    def evaluate(p):
        d, f = split_dead_time(float(p[0]), 1.0)
        M = np.zeros((3, n))
        M[0] = 1.0
        w1 = w[: max(n - d - 1, 0)]  # w[k - d - 1]
        w2 = w[: max(n - d - 2, 0)]  # w[k - d - 2]
        M[1, d + 1 :] = (1.0 - f) * w1
        M[1, d + 2 :] += f * w2
        M[2, d + 1 :] = -w1
        M[2, d + 2 :] += w2
        return M, None

    p, c, K, r, rss, M, _, it = _levenberg_marquardt(
        evaluate, y, [float(d0)], [0.0], [float(d_max)]
    )
    jac = (M * np.array([1.0, period, K / period])[:, None]).T
    est = Estimate("integrating", K / period, None, float(p[0]) * period, c, rss)
    return LeastSquaresFit(est, jac, r, it)
