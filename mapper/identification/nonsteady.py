"""Least-squares fits from a non-steady start: the model's starting state estimated too.

On real records the next move often comes before the last response has settled, so a test
window starts with the output still moving. For a first-order-plus-dead-time model the
motion left over from everything before the window is a free response decaying with the
model's own time constant, ``x0 exp(-t/tau)``, once the dead time after the last earlier
input change has passed. The fit here adds that free response to the model, with its
amplitude ``x0`` as a third linear parameter beside offset and gain, and, when the input
before the window is known, simulates the model over it so the first dead time of the
window is explained too. For the integrating model the leftover motion is a constant ramp,
added the same way. Everything is solved by variable projection (Golub & Pereyra, 1973)
with the Kaufman (1975) Jacobian and Levenberg-Marquardt steps (Marquardt, 1963).
Time is counted in samples inside; results are in seconds.
"""

from __future__ import annotations

import math

import numpy as np

from mapper.constants import MIN_BASELINE_SAMPLES, MIN_RESPONSE_SAMPLES
from mapper.errors import DataError
from mapper.identification.least_squares import TAU_MAX_POST_RECORDS, TAU_MIN_SAMPLES, LeastSquaresFit
from mapper.identification.models import split_dead_time, unit_response_rows
from mapper.identification.point_methods import Estimate
from mapper.signals import noise_sd

__all__ = ["least_squares_fopdt_from_state", "least_squares_integrating_from_state", "preceding_tail"]

_RIDGE = 1e-12  # relative ridge on the linear normal matrix (free response ~ offset when tau is long)


def _solve_linear(phi: np.ndarray, y: np.ndarray):
    """Coefficients, residuals and RSS of ``y = coef @ phi`` (rows of ``phi`` are the basis)."""
    gram = phi @ phi.T
    ridge = _RIDGE * np.trace(gram) / gram.shape[0]
    try:
        coef = np.linalg.solve(gram + ridge * np.eye(gram.shape[0]), phi @ y)
    except np.linalg.LinAlgError:
        coef = np.linalg.lstsq(phi.T, y, rcond=None)[0]
    r = y - coef @ phi
    return coef, r, float(r @ r), gram


def _variable_projection(evaluate, y, p0, lower, upper, max_iter=40):
    """Levenberg-Marquardt over the nonlinear parameters with the linear ones projected out.

    ``evaluate(p)`` returns ``(phi, jac)``: ``phi`` the linear basis rows and ``jac(coef)``
    the derivative rows of the model output with respect to ``p`` at those coefficients.
    Returns ``(p, coef, residuals, rss, phi, jac_rows, iterations)``.
    """
    p = np.clip(np.asarray(p0, dtype=float), lower, upper)
    phi, jac = evaluate(p)
    coef, r, rss, gram = _solve_linear(phi, y)
    lam = 1e-3
    it = 0
    for it in range(1, max_iter + 1):
        J = jac(coef)  # (m, n)
        cross = J @ phi.T
        try:
            proj = cross @ np.linalg.solve(gram + _RIDGE * np.trace(gram) * np.eye(gram.shape[0]), cross.T)
        except np.linalg.LinAlgError:
            break
        A = J @ J.T - proj
        b = J @ r
        diag = np.maximum(np.diag(A), 1e-12)
        accepted = False
        for _ in range(10):
            try:
                delta = np.linalg.solve(A + lam * np.diag(diag), b)
            except np.linalg.LinAlgError:
                lam *= 10
                continue
            p_new = np.clip(p + delta, lower, upper)
            predicted = float(delta @ b)
            if predicted <= 1e-10 * rss or (lam <= 1e-3 and predicted <= 1e-4 * rss / y.size):
                return p, coef, r, rss, phi, J, it
            phi_new, jac_new = evaluate(p_new)
            coef_new, r_new, rss_new, gram_new = _solve_linear(phi_new, y)
            if rss_new <= rss:
                accepted = True
                break
            lam *= 10
        if not accepted:
            break
        moved = float(np.max(np.abs(p_new - p)))
        gained = rss - rss_new
        p, phi, jac, coef, r, rss, gram = p_new, phi_new, jac_new, coef_new, r_new, rss_new, gram_new
        lam = max(lam / 10, 1e-9)
        if moved < 1e-4 or gained <= 1e-10 * max(rss, 1e-300):
            break
    return p, coef, r, rss, phi, jac(coef), it


def least_squares_fopdt_from_state(
    period: float,
    v: np.ndarray,
    y: np.ndarray,
    history: int,
    step_index: int,
    start: tuple[float, float],
    free: str = "decay",
    tau_max: float | None = None,
) -> LeastSquaresFit | None:
    """FOPDT by output-error least squares with the starting free response estimated.

    Parameters
    ----------
    period : float
        Sample period T (s).
    v : ndarray
        Input in deviation from its level before the move, over the preceding record
        used (``history`` samples) followed by the test window.
    y : ndarray
        Output over the test window only (``v.size - history`` samples).
    history : int
        Samples of preceding input at the start of ``v`` (0 when none is known).
    step_index : int
        First sample of the window after the input started to move.
    start : (tau, theta)
        Starting time constant and dead time in seconds (a fit from rest will do).
    free : {"decay", "ramp"}, default "decay"
        The leftover motion: the model's free response (a moving start), or a straight
        line through the whole window (a drift that does not die out), the rival
        explanation :mod:`mapper.identification.selection` weighs it against.
    tau_max : float, optional
        Upper bound on the time constant in seconds (default 50 records after the step).

    Returns
    -------
    LeastSquaresFit or None
        Jacobian columns (offset, gain, time_constant, dead_time, start_state) in
        seconds; ``estimate.start_state`` is the free-response amplitude at the window's
        first sample, with the preceding input's own response folded in. None when the
        record leaves nothing to fit.

    Notes
    -----
    The model over the window is ``y_k = c + K g_k(tau, theta) + x0 a^k`` with
    ``a = exp(-T/tau)``: the exact zero-order-hold FOPDT response ``g`` to the input
    (simulated from the start of the preceding record used) plus the free response of
    the model's state, which carries whatever the plant was doing before. This is the
    initial-state estimation of output-error identification (Ljung, *System
    Identification*, 1999, sec. 4.2 and 7.3: the initial condition as extra parameters);
    ``c, K, x0`` enter linearly and are projected out. Its uncertainty enters the
    interval through the extra Jacobian column.
    """
    n = y.size
    n_ext = v.size
    n_post = n - step_index
    d_max = n_post - MIN_RESPONSE_SAMPLES
    if d_max < 0 or n < 8:
        return None
    # the plant is taken at rest at the preceding record's first input, not at the level
    # before this move: a start from rest at the wrong level would be a step no earlier
    # move made, arriving inside the window one dead time later
    v0 = float(v[0]) if history > 0 else 0.0
    v_rest = v - v0
    tau_hi = TAU_MAX_POST_RECORDS * max(n_post, 1)
    if tau_max is not None:
        tau_hi = max(min(tau_hi, tau_max / period), 2.0 * TAU_MIN_SAMPLES)
    lower = np.array([math.log(TAU_MIN_SAMPLES), 0.0])
    upper = np.array([math.log(tau_hi), float(d_max)])
    rows = np.empty((4, n_ext))
    j = np.arange(n, dtype=float)
    y_mean = float(y.mean())
    yc = y - y_mean

    def evaluate(p):
        tau = math.exp(p[0])
        unit_response_rows(v_rest, tau, float(p[1]), rows)
        win = rows[:, history:]
        if free == "ramp":
            f, df = j / n, np.zeros(n)
        else:
            f = np.exp(-j / tau)
            df = f * (j / tau)  # d f / d(log tau)
        phi = np.vstack((win[0], win[1], f))
        dg_log_tau, dg_theta = win[2].copy(), win[3].copy()

        def jac(coef):
            return np.vstack((coef[1] * dg_log_tau + coef[2] * df, coef[1] * dg_theta))

        return phi, jac

    tau0 = max(float(start[0]) / period, TAU_MIN_SAMPLES)
    theta0 = float(np.clip(float(start[1]) / period, 0.0, d_max))
    thetas = {theta0, 0.5 * theta0}
    if history > 0:
        # the fit from rest, read off a window whose start carries an earlier move's
        # response, can have mistaken that response for this move's: seed longer dead
        # times too, so the earlier move's arrival is not taken for this one's
        thetas |= {f * d_max for f in (0.25, 0.5, 0.75)}
    best = None
    for factor in (1.0, 0.5, 2.0, 0.25, 4.0):
        for theta in sorted(thetas):
            p = np.clip([math.log(tau0 * factor), theta], lower, upper)
            phi, _ = evaluate(p)
            rss = _solve_linear(phi, yc)[2]
            if best is None or rss < best[0]:
                best = (rss, p)
    assert best is not None
    p, coef, r, rss, phi, J, it = _variable_projection(evaluate, yc, best[1], lower, upper)
    if not np.all(np.isfinite(coef)) or not math.isfinite(rss):
        return None
    tau_n = math.exp(float(p[0]))
    K, x0 = float(coef[1]), float(coef[2])
    c = float(coef[0]) + y_mean - K * v0  # the output at rest at the level before the move
    at_bound = bool(p[0] >= upper[0] - 1e-3 or p[0] <= lower[0] + 1e-3)
    jac = np.column_stack((phi[0], phi[1] + v0, J[0] / (tau_n * period), J[1] / period, phi[2]))
    if free == "ramp":
        start_state = x0  # for the line: its change over the whole window
        jac[:, 4] = phi[2] / n
    else:
        start_state = x0 + K * _history_amplitude(v, history, tau_n, float(p[1]), n, v0)
    est = Estimate(
        "fopdt", K, tau_n * period, float(p[1]) * period, c, rss, at_bound, True, start_state
    )
    return LeastSquaresFit(est, jac, r, it)


def _history_amplitude(v: np.ndarray, history: int, tau: float, theta: float, n: int, v0: float = 0.0) -> float:
    """Free-response amplitude, at the window's first sample, of the preceding input's response.

    The response to the input before the window, seen inside the window once its dead
    time has passed, decays as ``a^k``; its amplitude lets the window be redrawn from
    the window's own samples (:meth:`FitResult.fitted`).
    """
    if history == 0:
        return 0.0
    rows = np.empty((4, v.size))
    unit_response_rows(v - v0, tau, theta, rows)  # from rest at ``v0`` ...
    rows[1] += v0
    only_window = v.copy()  # ... against the window alone from rest at the move's level
    only_window[:history] = 0.0
    rows_window = np.empty((4, v.size))
    unit_response_rows(only_window, tau, theta, rows_window)
    leftover = rows[1, history:] - rows_window[1, history:]
    k = min(int(math.ceil(theta)) + 2, n - 1)
    return float(leftover[k] * math.exp(k / tau))


def least_squares_integrating_from_state(
    period: float, v: np.ndarray, y: np.ndarray, history: int, step_index: int, start_dead_time: float
) -> LeastSquaresFit | None:
    """Integrating-plus-dead-time fit with a starting ramp estimated.

    Notes
    -----
    ``y_k = c + k' w_k(theta) + s k``: the integrated input plus the ramp the output
    carried in from before (the integrator's input was off balance). ``c, k', s`` are
    linear. Jacobian columns (offset, gain, dead_time, start_state) in seconds;
    ``estimate.start_state`` is the starting ramp in output units per second.
    """
    n = y.size
    d_max = n - step_index - MIN_RESPONSE_SAMPLES
    if d_max < 0 or n < 8:
        return None
    w = np.cumsum(v)
    j = np.arange(n, dtype=float)
    y_mean = float(y.mean())
    yc = y - y_mean
    n_ext = v.size

    def evaluate(p):
        d, f = split_dead_time(float(p[0]), 1.0)
        g = np.zeros(n_ext)
        dg = np.zeros(n_ext)
        w1 = w[: max(n_ext - d - 1, 0)]
        w2 = w[: max(n_ext - d - 2, 0)]
        g[d + 1 :] = (1.0 - f) * w1
        g[d + 2 :] += f * w2
        dg[d + 1 :] = -w1
        dg[d + 2 :] += w2
        phi = np.vstack((np.ones(n), g[history:], j))
        dwin = dg[history:]

        def jac(coef):
            return (coef[1] * dwin)[None, :]

        return phi, jac

    lower, upper = np.array([0.0]), np.array([float(d_max)])
    theta0 = float(np.clip(start_dead_time / period, 0.0, d_max))
    p, coef, r, rss, phi, J, it = _variable_projection(evaluate, yc, [theta0], lower, upper)
    if not np.all(np.isfinite(coef)):
        return None
    jac = np.column_stack((phi[0], phi[1] * period, J[0] / period, phi[2] * period))
    est = Estimate(
        "integrating",
        float(coef[1]) / period,
        None,
        float(p[0]) * period,
        float(coef[0]) + y_mean,
        rss,
        start_state=float(coef[2]) / period,
    )
    return LeastSquaresFit(est, jac, r, it)


def preceding_tail(preceding, step_index: int, t: np.ndarray, u: np.ndarray) -> np.ndarray:
    """The preceding input worth simulating before a window (empty when there is none).

    Parameters
    ----------
    preceding : (ndarray, ndarray) or None
        Times and input of the record before the window.
    step_index : int
        Samples of the window before its own move (its baseline).
    t, u : ndarray
        The window's times and input.

    Returns
    -------
    ndarray
        The last samples of the preceding input: enough to cover a dead time as long as
        the baseline and to reach back over the last earlier move within a window's
        length; empty when the input did not move there (a flat preceding input adds
        nothing).
    """
    if preceding is None:
        return np.empty(0)
    t_before, u_before = (np.asarray(a, dtype=float) for a in preceding)
    if t_before.size == 0 and u_before.size == 0:
        return np.empty(0)
    if t_before.ndim != 1 or t_before.shape != u_before.shape:
        raise DataError(
            f"the preceding record needs times and input of one length, got shapes "
            f"{t_before.shape}, {u_before.shape}",
            hint="pass (t, u) of the samples just before the window",
        )
    if not np.all(np.isfinite(u_before)) or t_before[-1] >= t[0]:
        return np.empty(0)
    length = max(step_index, MIN_BASELINE_SAMPLES * 3)
    # reach back over the last move before the window when it lies within a window's
    # length: its response may still be in its dead time as the window starts, which no
    # free response can stand for
    scale = max(float(np.max(np.abs(u_before))), float(abs(u[0])), 1e-300)
    threshold = max(6.0 * noise_sd(u_before), 1e-9 * scale)
    moved = np.flatnonzero(np.abs(u_before[-t.size :] - u[0]) > threshold)
    if moved.size:
        length = max(length, min(u_before.size, t.size) - int(moved[-1]) + MIN_BASELINE_SAMPLES)
    tail = u_before[-length:]
    # the input moved in the tail, or between the tail and the window's first sample
    seen = np.append(tail, u[0])
    if float(np.ptp(seen)) <= max(6.0 * noise_sd(seen), 1e-9 * scale):
        return np.empty(0)
    return tail
