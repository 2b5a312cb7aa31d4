"""Disturbances a step test can carry that the input does not explain.

Two checks on a fitted test, both judged against the size of the response (the rule of
thumb ``MISFIT_FRACTION`` of :mod:`mapper.constants`, common practice):

- :func:`find_load_change`: a change of the output's baseline during the test, such as a
  load step or a pump start, entering through the process lag;
- :func:`record_wander`: how far the slow part of the fitted noise model moves the output
  over the record (a wander the intervals already allow for, but one that large makes the
  test hard to read).

Pure numpy; :mod:`mapper.identification.identify` raises the flags ``load_change`` and
``slow_disturbance`` (registered in :mod:`mapper.identification.flags`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mapper.constants import MISFIT_FRACTION
from mapper.identification.models import first_order_filter
from mapper.identification.uncertainty import DisturbanceCovariance, _ar1_times

__all__ = ["LoadChange", "find_load_change", "record_wander", "disturbance_flags"]

MAX_CANDIDATES = 60  # change instants tried per test
# limits of the load_change flag, set on seeded simulations (scripts/interval_study.py
# plants; tests/test_uncertainty.py): no flag on 120 tests with white, fast AR(1), slow
# AR(1) or random-walk noise; a load step of 30 % of the response is flagged
MIN_T_STATISTIC = 8.0  # the change stands this many standard errors out of the fast noise
MIN_WANDER_RATIO = 5.0  # and is this many times the record wander of the noise model


@dataclass(frozen=True)
class LoadChange:
    """The largest unexplained change of baseline found in a test.

    Attributes
    ----------
    index : int
        Sample at which the change starts.
    size : float
        Final output change it causes (output units).
    t_statistic : float
        Its size over its standard error under the noise model given.
    """

    index: int
    size: float
    t_statistic: float


def find_load_change(
    residuals: np.ndarray,
    jacobian: np.ndarray,
    first: int,
    time_constant_samples: float | None,
    white_sd: float,
    correlated_sd: float = 0.0,
    correlation_samples: float = 0.0,
) -> LoadChange | None:
    """Scan a fitted test for a step of load entering through the process lag.

    Parameters
    ----------
    residuals : ndarray, shape (n,)
        Output minus the fitted model.
    jacobian : ndarray, shape (n, p)
        Sensitivities of the fitted model (offset, gain, ...) at the optimum.
    first : int
        First sample at which a change is looked for (after the response started).
    time_constant_samples : float or None
        Fitted time constant in samples; None (integrating model) tries plain steps.
    white_sd, correlated_sd, correlation_samples : float
        The noise to judge against: white noise plus an AR(1) part of correlation time
        ``correlation_samples``. Pass only the fast part of the fitted noise model (see
        :class:`~mapper.identification.uncertainty.DisturbanceCovariance`): a slow wander
        and a load change are both slow moves, told apart by size (:func:`record_wander`).

    Returns
    -------
    LoadChange or None
        None when the record leaves no room to look.

    Notes
    -----
    A load change of size ``d`` at sample ``k`` adds ``d (1 - exp(-(i - k)/tau))`` for
    ``i >= k``. For every candidate ``k`` the regressor is made orthogonal to the model's
    sensitivities (so the fitted gain and time constant may move to make room for it) and
    regressed on the residuals: the linearised joint fit of model plus load change, i.e. a
    score test of an added regressor (Rao 1948; for change points, Hinkley 1970), with the
    score's variance ``x'Sx`` under the given noise model (white plus AR(1)). The
    candidate with the largest t statistic is returned.
    """
    r = np.asarray(residuals, dtype=float)
    J = np.asarray(jacobian, dtype=float)
    n = r.size
    last = n - max(5, n // 20)
    if last - first < 3 or not (white_sd > 0 or correlated_sd > 0):
        return None
    candidates = np.unique(np.linspace(first, last, min(MAX_CANDIDATES, last - first)).astype(int))
    q, _ = np.linalg.qr(J / np.maximum(np.linalg.norm(J, axis=0), 1e-300))
    p = q.shape[1]
    with_correlated = correlated_sd > 0 and correlation_samples > 0
    rho = math.exp(-1.0 / correlation_samples) if with_correlated else 0.0
    # the regressor of a change at k is h(i - k) for i >= k; every product with it, for
    # every k at once, is a tail sum over the record (see _tail_products)
    columns = [r[:, None], q] + ([_ar1_times(q, rho, axis=0)] if with_correlated else [])
    products = _tail_products(np.hstack(columns), time_constant_samples)[candidates]
    x_r, q_x = products[:, 0], products[:, 1:1 + p]
    h = _change_shape(n, time_constant_samples)
    x_x = np.cumsum(h * h)[n - 1 - candidates]  # ||x_k||^2: h^2 summed over the n - k samples left
    energy = x_x - np.einsum("ij,ij->i", q_x, q_x)
    ok = energy > 1e-9 * x_x
    if not ok.any():
        return None
    score = x_r - q_x @ (q.T @ r)
    variance = white_sd**2 * np.where(ok, energy, 0.0)
    if with_correlated:
        q_rx = products[:, 1 + p:]
        x_rx = _correlated_energy(h, rho)[n - 1 - candidates]
        q_rq = q.T @ columns[2]
        orthogonal = (x_rx - 2.0 * np.einsum("ij,ij->i", q_x, q_rx)
                      + np.einsum("ij,jk,ik->i", q_x, q_rq, q_x))
        variance = variance + correlated_sd**2 * orthogonal
    ok &= variance > 0
    t_statistic = np.where(ok, np.abs(score) / np.sqrt(np.where(ok, variance, 1.0)), 0.0)
    best = int(np.argmax(t_statistic))
    size = float(score[best] / energy[best]) * float(h[n - 1 - candidates[best]])
    return LoadChange(int(candidates[best]), size, float(t_statistic[best]))


def _change_shape(n: int, time_constant_samples: float | None) -> np.ndarray:
    """``h(j)``, j = 0..n-1: the output change a unit load change makes j samples on,
    entering through the process lag (a plain step without one)."""
    if time_constant_samples is not None and time_constant_samples > 0:
        return -np.expm1(-np.arange(n) / time_constant_samples)
    return np.ones(n)


def _tail_products(f: np.ndarray, time_constant_samples: float | None) -> np.ndarray:
    """``sum_{i >= k} h(i - k) f[i]`` for every start ``k`` (rows) and column of ``f``.

    With ``h(j) = 1 - a^j`` it is the tail sum of ``f`` less the backward first-order
    filter of ``f`` (pole ``a = exp(-1/tau)``), so all starts cost two passes over the
    record instead of one product per start.
    """
    tail = np.cumsum(f[::-1], axis=0)[::-1]
    if time_constant_samples is None or time_constant_samples <= 0:
        return tail
    a = math.exp(-1.0 / time_constant_samples)
    backward = first_order_filter(np.ascontiguousarray(f[::-1].T), a)[:, ::-1].T
    return tail - backward


def _correlated_energy(h: np.ndarray, rho: float) -> np.ndarray:
    """``S[L - 1] = sum_{i, j < L} h_i h_j rho^|i - j|`` for every length L: the AR(1)
    quadratic form of a change regressor with L samples left in the record."""
    forward = first_order_filter(h, rho)  # sum_{j <= i} h_j rho^(i - j)
    before = np.concatenate(([0.0], rho * forward[:-1]))  # the same over j < i
    return np.cumsum(h * h + 2.0 * h * before)


def record_wander(correlated_sd: float, correlation_samples: float, samples: int) -> float:
    """Standard deviation of the change the slow noise part makes between the record's ends.

    Notes
    -----
    For an AR(1) part of marginal sd ``s`` and coefficient ``a = exp(-1/c)`` the difference
    of two samples ``n`` apart has variance ``2 s^2 (1 - a^n)`` (Box & Jenkins 1970).
    """
    if correlated_sd <= 0 or correlation_samples <= 0:
        return 0.0
    return correlated_sd * math.sqrt(2.0 * -math.expm1(-samples / correlation_samples))


def disturbance_flags(
    residuals: np.ndarray,
    jacobian: np.ndarray,
    *,
    first: int,
    period: float,
    time_constant: float | None,
    response: float,
    noise: DisturbanceCovariance,
    fast_noise_sd: float,
) -> tuple[list[str], list[str]]:
    """Flags ``load_change`` and ``slow_disturbance`` for a fitted test, with a note each.

    Parameters
    ----------
    residuals, jacobian : ndarray
        Of the least-squares fit at its optimum.
    first : int
        First sample after the response started (step plus dead time).
    period : float
        Sample period (s).
    time_constant : float or None
        Fitted time constant (s); None for the integrating model.
    response : float
        Output change the step caused.
    noise : DisturbanceCovariance
        The fitted noise model.
    fast_noise_sd : float
        Robust sample-to-sample noise of the residuals (used when the noise model holds no
        white part and its correlated part is slow).

    Returns
    -------
    flags, notes : list of str
        Notes carry the sizes and times found.

    Notes
    -----
    ``load_change`` (common practice, limits measured on seeded simulations, see
    ``docs/methods.md``): the change found by :func:`find_load_change` moves the output by
    at least ``MISFIT_FRACTION`` of the response, stands ``MIN_T_STATISTIC`` standard errors
    out of the fast noise, and is ``MIN_WANDER_RATIO`` times the record wander of the noise
    model. ``slow_disturbance``: the record wander (:func:`record_wander`) is at least
    ``MISFIT_FRACTION`` of the response.
    """
    flags: list[str] = []
    notes: list[str] = []
    n = residuals.size
    if not response or not np.isfinite(response):
        return flags, notes
    tau_samples = time_constant / period if time_constant else None
    slow_limit = tau_samples if tau_samples is not None else 0.1 * n
    fast = noise.correlation_samples < slow_limit
    wander = 0.0 if fast else record_wander(noise.correlated_sd, noise.correlation_samples, n)
    white = noise.white_sd if (fast or noise.white_sd > 0) else fast_noise_sd
    change = find_load_change(
        residuals, jacobian, first, tau_samples, white,
        noise.correlated_sd if fast else 0.0, noise.correlation_samples if fast else 0.0,
    )  # fmt: skip
    if (
        change is not None
        and abs(change.size) >= MISFIT_FRACTION * abs(response)
        and change.t_statistic >= MIN_T_STATISTIC
        and abs(change.size) >= MIN_WANDER_RATIO * wander
    ):
        flags.append("load_change")
        notes.append(
            f"The output's baseline moved by about {100 * abs(change.size / response):.0f} % of the "
            f"response from {change.index * period:.4g} s after the record start, which the input "
            "does not explain."
        )
    if wander >= MISFIT_FRACTION * abs(response):
        flags.append("slow_disturbance")
        notes.append(
            f"The output wanders slowly by about {100 * wander / abs(response):.0f} % of the response "
            "over the record; the intervals allow for it."
        )
    return flags, notes
