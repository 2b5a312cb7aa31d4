"""Response maths of the process models mapper identifies.

This module owns the first-order-plus-dead-time (FOPDT) and integrating-plus-dead-time
models: their exact zero-order-hold (ZOH) discretisation with a fractional dead time,
their response to any sampled input, their sensitivities to the parameters and the
analytic step response. It uses numpy only (its own first-order recursive filter, so the fit path never
imports ``scipy.signal``) and knows nothing of files, stores or quality checks.

Conventions (see ``docs/interfaces.md``): time in seconds, arrays 1-D float64 on a
uniform grid of period ``period``, the input held constant between samples, and the
process at rest before the first sample, so the response is ``y0 + G * (u - u0)``
with ``u0 = u[0]`` unless given.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "first_order_filter",
    "zoh_coefficients",
    "split_dead_time",
    "simulate_fopdt",
    "fopdt_sensitivities",
    "fopdt_unit_response",
    "unit_response_rows",
    "simulate_integrating",
    "integrating_unit_response",
    "step_response",
]


def _check_positive(name: str, value: float) -> None:
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")


# exp(300) ~ 1e130: block length for the scaled running sum, far from overflow
_BLOCK_LOG_SCALE = 300.0
# a pole whose impulse response falls under 1e-17 within this many terms is run as a short
# moving sum (a < 0.087); longer responses use the scaled running sum
_FIR_TERMS = 16


def first_order_filter(x: np.ndarray, pole: float) -> np.ndarray:
    """Run ``y[k] = pole * y[k-1] + x[k]`` from rest (``y[-1] = 0``) along the last axis.

    Parameters
    ----------
    x : ndarray
        Input, 1-D or 2-D (each row filtered on its own).
    pole : float
        ``a`` in ``[0, 1]``: ``exp(-T/tau)`` for a zero-order-hold first-order lag, or an
        AR(1) coefficient; ``1`` gives the running sum (an integrator).

    Returns
    -------
    ndarray
        Same shape as ``x``, float64. Equals ``scipy.signal.lfilter([1], [1, -pole], x)``
        to rounding (checked in the tests).

    Notes
    -----
    The recursion is solved in closed form, ``y[k] = a^k sum_{j<=k} a^-j x[j]`` (the
    discrete convolution with the geometric impulse response), evaluated with numpy's
    running sum in blocks short enough that ``a^-j`` stays below ``exp(300)`` and the
    state carried between blocks; rounding stays of the order of the recursion's own
    (``eps * max|x| / (1 - a)``). For a pole so small that the impulse response falls
    under ``1e-17`` within 16 terms it is cut there (a short moving sum). No Python loop
    runs per sample.
    """
    x = np.asarray(x, dtype=float)
    a = float(pole)
    if not 0.0 <= a <= 1.0:
        raise ValueError(f"pole must be in [0, 1], got {pole!r}")
    n = x.shape[-1]
    if a == 1.0:
        return np.cumsum(x, axis=-1)
    if a == 0.0 or n == 0:
        return x.copy()
    rate = -math.log(a)  # a = exp(-rate)
    terms = int(math.ceil(39.2 / rate))  # a^terms < 1e-17: the rest is below rounding
    if terms <= _FIR_TERMS:
        y = x.copy()
        weight = 1.0
        for m in range(1, min(terms, n)):
            weight *= a
            y[..., m:] += weight * x[..., :-m]
        return y
    block = min(n, max(1, int(_BLOCK_LOG_SCALE / rate)))
    grow, decay = _powers(rate, block)
    if block == n:
        return decay * np.cumsum(x * grow, axis=-1)
    y = np.empty_like(x)
    carry = None
    for start in range(0, n, block):
        stop = min(start + block, n)
        m = stop - start
        part = decay[:m] * np.cumsum(x[..., start:stop] * grow[:m], axis=-1)
        if carry is not None:
            part += carry[..., None] * (a * decay[:m])
        y[..., start:stop] = part
        carry = part[..., -1]
    return y


_LAST_POWERS: list = [None, None, None]  # (rate, block) and its powers: callers repeat a pole


def _powers(rate: float, block: int) -> tuple[np.ndarray, np.ndarray]:
    """``a^-k`` and ``a^k`` for ``k < block``, ``a = exp(-rate)`` (the last pair is kept)."""
    if _LAST_POWERS[0] == (rate, block):
        return _LAST_POWERS[1], _LAST_POWERS[2]
    k = np.arange(block, dtype=float) * rate
    grow = np.exp(k)
    decay = 1.0 / grow
    _LAST_POWERS[:] = [(rate, block), grow, decay]
    return grow, decay


def _shifted_pair(w: np.ndarray, d: int, c1: float, c2: float) -> np.ndarray:
    """``c1 w[k-d-1] + c2 w[k-d-2]`` with zeros before the record (the plant at rest)."""
    n = w.size
    out = np.zeros(n)
    if d + 1 < n:
        out[d + 1 :] = c1 * w[: n - d - 1]
    if d + 2 < n:
        out[d + 2 :] += c2 * w[: n - d - 2]
    return out


def split_dead_time(dead_time: float, period: float) -> tuple[int, float]:
    """Split a dead time into whole samples and a fraction of a sample.

    Parameters
    ----------
    dead_time : float
        Dead time theta in seconds, ``>= 0``.
    period : float
        Sample period T in seconds.

    Returns
    -------
    delay_samples : int
        ``d`` such that ``theta = d * T + f``.
    fraction : float
        ``f`` in seconds, ``0 <= f < T``.
    """
    _check_positive("period", period)
    if not (np.isfinite(dead_time) and dead_time >= 0):
        raise ValueError(f"dead_time must be finite and >= 0, got {dead_time!r}")
    ratio = dead_time / period
    d = int(math.floor(ratio + 1e-12))  # tolerate round-off at whole samples
    f = dead_time - d * period
    if f < 0.0:
        f = 0.0
    if f >= period:  # pragma: no cover - guarded by the tolerance above
        d, f = d + 1, 0.0
    return d, f


def zoh_coefficients(
    gain: float, time_constant: float, dead_time: float, period: float
) -> tuple[float, float, float, int]:
    """Exact zero-order-hold discretisation of a FOPDT model with fractional dead time.

    With ``theta = d*T + f`` (``0 <= f < T``) the sampled response obeys
    ``y[k+1] = a*y[k] + b1*u[k-d] + b2*u[k-d-1]``.

    Parameters
    ----------
    gain : float
        Steady-state gain K (output units per input unit).
    time_constant : float
        Time constant tau in seconds, ``> 0``.
    dead_time : float
        Dead time theta in seconds, ``>= 0``.
    period : float
        Sample period T in seconds.

    Returns
    -------
    a, b1, b2 : float
        ``a = exp(-T/tau)``, ``b1 = K*(1 - exp(-(T-f)/tau))``,
        ``b2 = K*(exp(-(T-f)/tau) - a)``.
    delay_samples : int
        Whole-sample part ``d`` of the dead time.

    Notes
    -----
    Exact integration of ``tau dy/dt + y = K u(t - theta)`` over one period with the
    input held between samples (zero-order hold); the fractional part of the delay
    splits each held input value over two periods (the "modified z-transform";
    Franklin, Powell & Workman, *Digital Control of Dynamic Systems*, 1998).
    """
    _check_positive("time_constant", time_constant)
    d, f = split_dead_time(dead_time, period)
    a = math.exp(-period / time_constant)
    e = math.exp(-(period - f) / time_constant)
    return a, gain * (1.0 - e), gain * (e - a), d


def _deviation(u: np.ndarray, u0: float | None) -> np.ndarray:
    u = np.asarray(u, dtype=float)
    if u.ndim != 1:
        raise ValueError(f"input must be a 1-D array, got shape {u.shape}")
    return u - (u[0] if u0 is None else float(u0))


def fopdt_unit_response(
    v: np.ndarray, period: float, time_constant: float, dead_time: float
) -> np.ndarray:
    """Unit-gain FOPDT response to an input in deviation form ``v = u - u0``."""
    a, b1, b2, d = zoh_coefficients(1.0, time_constant, dead_time, period)
    return _shifted_pair(first_order_filter(v, a), d, b1, b2)


def simulate_fopdt(
    u: np.ndarray,
    period: float,
    gain: float,
    time_constant: float,
    dead_time: float,
    *,
    u0: float | None = None,
    y0: float = 0.0,
) -> np.ndarray:
    """Response of a FOPDT process to a sampled input.

    Parameters
    ----------
    u : ndarray
        Input samples on a uniform grid, held between samples.
    period : float
        Sample period T in seconds.
    gain, time_constant, dead_time : float
        K, tau (s, ``> 0``) and theta (s, ``>= 0``).
    u0 : float, optional
        Input at which the process was at rest; default ``u[0]``.
    y0 : float, default 0.0
        Output at rest.

    Returns
    -------
    ndarray
        Output samples, same length as ``u``.

    Notes
    -----
    Uses the exact ZOH difference equation of :func:`zoh_coefficients`, evaluated with
    :func:`first_order_filter`.
    """
    v = _deviation(u, u0)
    return y0 + gain * fopdt_unit_response(v, period, time_constant, dead_time)


def fopdt_sensitivities(
    u: np.ndarray,
    period: float,
    gain: float,
    time_constant: float,
    dead_time: float,
    *,
    u0: float | None = None,
) -> np.ndarray:
    """Derivatives of the sampled FOPDT response with respect to K, tau and theta.

    Parameters
    ----------
    u : ndarray
        Input samples.
    period : float
        Sample period T in seconds.
    gain, time_constant, dead_time : float
        The point at which to differentiate.
    u0 : float, optional
        Input at rest; default ``u[0]``.

    Returns
    -------
    ndarray, shape (n, 3)
        Columns ``dy/dK``, ``dy/dtau``, ``dy/dtheta``.

    Notes
    -----
    Analytic: the coefficients ``a, b1, b2`` are differentiated and the derivative
    recursion is filtered with the same pole. The dead-time derivative is taken within
    the current sample interval (right-hand derivative where the dead time is a whole
    number of samples), which is where the sampled response has a kink for ideal steps.
    """
    v = _deviation(u, u0)
    tau = float(time_constant)
    _check_positive("time_constant", tau)
    _check_positive("period", period)
    if not (np.isfinite(dead_time) and dead_time >= 0):
        raise ValueError(f"dead_time must be finite and >= 0, got {dead_time!r}")
    rows = np.empty((4, v.size))
    unit_response_rows(v, tau / period, dead_time / period, rows)
    # rows hold d/d(log tau) and d/dtheta in samples; convert to seconds
    return np.column_stack([rows[1], gain * rows[2] / tau, gain * rows[3] / period])


def unit_response_rows(
    v: np.ndarray, time_constant: float, dead_time: float, out: np.ndarray
) -> np.ndarray:
    """Unit-gain FOPDT response and its sensitivities, time counted in samples.

    Parameters
    ----------
    v : ndarray, shape (n,)
        Input in deviation form, held between samples.
    time_constant, dead_time : float
        tau and theta in samples (``tau > 0``, ``theta >= 0``); not checked.
    out : ndarray, shape (4, n)
        Filled with rows ``1``, ``g``, ``dg/d(log tau)`` and ``dg/dtheta``.

    Returns
    -------
    ndarray
        The double-pole filter output ``z = v / (1 - a q^-1)^2`` (it does not depend
        on the dead time, so callers may reuse it).

    Notes
    -----
    Every row is a three-tap combination of ``z`` delayed by the whole-sample dead
    time: the ZOH numerator ``b1 + b2 q^-1`` and its derivatives over the single pole
    are rewritten over the double pole, so one filter run gives all rows. This is
    the inner loop of the least-squares fit; it makes few numpy calls on purpose.
    """
    n = v.size
    tau = time_constant
    d = int(math.floor(dead_time + 1e-12))
    f = dead_time - d
    if f < 0.0:
        f = 0.0
    a = math.exp(-1.0 / tau)
    e = math.exp(-(1.0 - f) / tau)
    z = first_order_filter(first_order_filter(v, a), a)
    b1, b2 = 1.0 - e, e - a
    da = a / (tau * tau)
    db1 = -e * (1.0 - f) / (tau * tau)
    db2 = -db1 - da
    c = e / tau
    # columns: coefficients of z[j-2], z[j-1], z[j] (j counted from the delay d+1);
    # w[j] = z[j] - a z[j-1] is the single-pole response the ZOH numerator acts on
    coef = np.array(
        [
            [-a * b2, b2 - a * b1, b1],
            [tau * (da * b2 - a * db2), tau * (db2 - a * db1 + da * b1), tau * db1],
            [-c * a, c * (1.0 + a), -c],
        ]
    )
    s = d + 1
    length = n - s
    out[0] = 1.0
    out[1:, :s] = 0.0
    if length > 0:
        padded = np.concatenate((_TWO_ZEROS, z[:length]))
        # rows z[j-2], z[j-1], z[j] as one strided view of the padded run (no copies)
        taps = np.ndarray((3, length), buffer=padded, strides=(padded.itemsize,) * 2)
        np.matmul(coef, taps, out=out[1:, s:])
    return z


_TWO_ZEROS = np.zeros(2)


def _delay(x: np.ndarray, shift: int) -> np.ndarray:
    """``x`` delayed by ``shift`` samples, zeros shifted in (the process was at rest)."""
    out = np.zeros_like(x)
    if shift < x.size:
        out[shift:] = x[: x.size - shift]
    return out


def integrating_unit_response(v: np.ndarray, period: float, dead_time: float) -> np.ndarray:
    """Unit-gain integrating response ``integral of v(t - theta) dt`` with ZOH input."""
    d, f = split_dead_time(dead_time, period)
    return _shifted_pair(np.cumsum(v), d, period - f, f)


def simulate_integrating(
    u: np.ndarray,
    period: float,
    gain: float,
    dead_time: float,
    *,
    u0: float | None = None,
    y0: float = 0.0,
) -> np.ndarray:
    """Response of an integrating-plus-dead-time process ``dy/dt = k' u(t - theta)``.

    Parameters
    ----------
    u : ndarray
        Input samples, held between samples.
    period : float
        Sample period T in seconds.
    gain : float
        Integrating gain k' (output units per second per input unit).
    dead_time : float
        theta in seconds, ``>= 0``.
    u0 : float, optional
        Input at which the output is at rest (no ramp); default ``u[0]``.
    y0 : float, default 0.0
        Output at the start.

    Returns
    -------
    ndarray
        Output samples.

    Notes
    -----
    Exact ZOH integration: ``y[k+1] = y[k] + k'((T-f) v[k-d] + f v[k-d-1])``.
    """
    v = _deviation(u, u0)
    return y0 + gain * integrating_unit_response(v, period, dead_time)


def step_response(
    t: np.ndarray, gain: float, time_constant: float, dead_time: float
) -> np.ndarray:
    """Analytic FOPDT response to a unit step applied at ``t = 0``.

    Parameters
    ----------
    t : ndarray
        Times in seconds (any spacing).
    gain, time_constant, dead_time : float
        K, tau (s, ``>= 0``; zero gives a pure delay) and theta (s).

    Returns
    -------
    ndarray
        ``K*(1 - exp(-(t - theta)/tau))`` for ``t >= theta``, 0 before.
    """
    t = np.asarray(t, dtype=float)
    s = t - dead_time
    out = np.zeros_like(t)
    after = s >= 0
    if time_constant > 0:
        out[after] = gain * -np.expm1(-s[after] / time_constant)
    else:
        out[s > 0] = gain
    return out
