"""Loop margins from the exact frequency response: maximum sensitivity, gain and phase margin.

This module owns the frequency-domain robustness figures of a PI loop on a first-order-plus-dead-time
(FOPDT) or integrating-plus-dead-time process, and of any loop given as a frequency-response callable.
The dead time enters as ``exp(-j w theta)`` exactly (no Padé approximation). Frequencies in rad/s,
times in s; the controller is the ideal PI ``C(s) = kc (1 + 1/(ti s))``.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq, minimize_scalar

from mapper.errors import DataError

MODELS = ("fopdt", "integrating")

def check_process(gain, time_constant, dead_time, model) -> None:
    """Raise :class:`DataError` for process parameters no rule or margin can use."""
    if model not in MODELS:
        raise DataError(f"model must be one of {MODELS}; got {model!r}")
    if not np.isfinite(gain) or gain == 0:
        raise DataError(f"process gain must be finite and non-zero; got {gain!r}")
    if not np.isfinite(dead_time) or dead_time < 0:
        raise DataError(f"dead time must be finite and >= 0 s; got {dead_time!r}")
    if model == "fopdt" and (time_constant is None or not np.isfinite(time_constant) or time_constant <= 0):
        raise DataError(f"time constant must be finite and > 0 s for an FOPDT model; got {time_constant!r}")


@dataclass(frozen=True)
class LoopMargins:
    """Robustness of one loop.

    Attributes
    ----------
    ms : float
        Maximum sensitivity ``max |1 / (1 + L(jw))|``; ``inf`` when the closed loop is unstable.
    gain_margin : float
        ``1 / |L|`` at the phase crossover (``inf`` when the phase never reaches -180 deg).
    phase_margin_deg : float
        ``180 + arg L`` at the gain crossover, degrees (``inf`` when ``|L|`` never crosses 1).
    gain_crossover, phase_crossover, ms_frequency : float
        Frequencies, rad/s (NaN when absent).
    stable : bool
        Closed-loop stability (see :func:`frequency_margins`).
    flags : tuple of str
    """

    ms: float
    gain_margin: float
    phase_margin_deg: float
    gain_crossover: float
    phase_crossover: float
    ms_frequency: float
    stable: bool
    flags: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {"ms": self.ms, "gain_margin": self.gain_margin, "phase_margin_deg": self.phase_margin_deg,
                "gain_crossover": self.gain_crossover, "phase_crossover": self.phase_crossover,
                "ms_frequency": self.ms_frequency, "stable": self.stable, "flags": list(self.flags)}


def loop_response(kc, ti, gain, time_constant, dead_time, w, *, model="fopdt"):
    """Exact ``L(jw) = C(jw) G(jw)`` and its continuous phase, for a PI on FOPDT/integrating process.

    Returns
    -------
    (ndarray of complex, ndarray of float)
        Loop frequency response and its phase in radians (analytic, no unwrapping needed; valid
        for ``kc * gain > 0``).
    """
    w = np.asarray(w, dtype=float)
    jw = 1j * w
    controller = kc * (1.0 + 1.0 / (ti * jw))
    delay = np.exp(-jw * dead_time)
    if model == "integrating":
        plant = gain * delay / jw
        phase = np.arctan(w * ti) - np.pi - w * dead_time
    else:
        plant = gain * delay / (time_constant * jw + 1.0)
        phase = np.arctan(w * ti) - np.pi / 2 - np.arctan(w * time_constant) - w * dead_time
    return controller * plant, phase


def _frequency_grid(kc, ti, gain, time_constant, dead_time, model, points_per_decade=200):
    scales = [ti, dead_time] + ([time_constant] if model == "fopdt" else [])
    scales = [s for s in scales if s and s > 0]
    loop_speed = abs(kc * gain) / (time_constant if model == "fopdt" else 1.0)
    w_min = 1e-3 / max(scales)
    w_max = 100.0 * max(1.0 / min(scales), loop_speed)
    n = int(points_per_decade * np.log10(w_max / w_min)) + 2
    return np.logspace(np.log10(w_min), np.log10(w_max), n)


def loop_margins(kc: float, ti: float, gain: float, time_constant: float | None, dead_time: float, *,
                 model: str = "fopdt", points_per_decade: int = 200) -> LoopMargins:
    """Ms, gain margin and phase margin of a PI loop on an FOPDT or integrating process.

    Parameters
    ----------
    kc, ti : float
        PI controller gain and integral time (s).
    gain, time_constant, dead_time : float
        Process parameters (``time_constant`` ignored for ``model="integrating"``).
    model : {"fopdt", "integrating"}
    points_per_decade : int
        Density of the logarithmic frequency grid before local refinement.

    Returns
    -------
    LoopMargins

    Notes
    -----
    The loop is evaluated exactly, the dead time as ``exp(-j w theta)`` (no Padé approximation), on
    a dense logarithmic grid; crossovers are refined with Brent's method and the sensitivity peak
    with a bounded scalar search. See :func:`frequency_margins` for the stability test.
    """
    check_process(gain, time_constant, dead_time, model)
    if not (np.isfinite(kc) and kc != 0 and np.isfinite(ti) and ti > 0):
        raise DataError(f"controller needs finite non-zero kc and ti > 0; got kc={kc!r}, ti={ti!r}")
    if kc * gain < 0:
        return LoopMargins(math.inf, 0.0, -math.inf, math.nan, math.nan, math.nan, False,
                           ("controller_action_opposes_process",))
    w = _frequency_grid(kc, ti, gain, time_constant, dead_time, model, points_per_decade)

    def response(x):
        return loop_response(kc, ti, gain, time_constant, dead_time, x, model=model)[0]

    def phase(x):
        return loop_response(kc, ti, gain, time_constant, dead_time, x, model=model)[1]

    return frequency_margins(response, w=w, phase=phase)


def frequency_margins(response: Callable, *, w, phase: Callable | None = None) -> LoopMargins:
    """Margins of any loop given its frequency response on a grid.

    Parameters
    ----------
    response : callable
        ``response(w) -> L(jw)`` (complex array) for an array of frequencies in rad/s.
    w : array_like
        Increasing frequency grid, dense enough that the phase moves less than about 1 rad between
        neighbours near the crossovers.
    phase : callable, optional
        Continuous phase of L in radians; default unwraps ``angle(L)`` along the grid.

    Returns
    -------
    LoopMargins

    Notes
    -----
    Stability test, valid for the loops this package builds (positive loop gain, open-loop poles
    only at the origin or in the left half-plane, ``|L|`` falling with frequency): by the Nyquist
    criterion the closed loop is stable when the phase starts above -180 degrees and ``|L| < 1``
    at every crossing of -180 degrees (mod 360), i.e. gain margin > 1. Ms is reported as infinite
    for an unstable loop. Gain margin is the smallest over all phase crossovers, phase margin the
    smallest over all gain crossovers.
    """
    w = np.asarray(w, dtype=float)
    values = response(w)
    magnitude = np.abs(values)
    if phase is None:
        grid_phase = np.unwrap(np.angle(values))

        def phase_at(x):
            raw = np.angle(response(np.atleast_1d(x)))[0]
            guess = np.interp(np.log(x), np.log(w), grid_phase)
            return raw + 2 * np.pi * np.round((guess - raw) / (2 * np.pi))
    else:
        grid_phase = np.asarray(phase(w), dtype=float)

        def phase_at(x):
            return float(np.asarray(phase(np.atleast_1d(x)))[0])

    flags: list[str] = []
    log_w = np.log(w)

    # Phase crossovers: every crossing of -180 - k 360 degrees.
    branch = np.floor((grid_phase + np.pi) / (2 * np.pi))
    worst_gain, phase_crossover = 0.0, math.nan
    crossings = np.flatnonzero(np.diff(branch) != 0)
    if crossings.size:
        # Refine only crossings whose grid magnitude could hold the largest |L| (a delay loop crosses
        # -180 - k 360 degrees endlessly at ever smaller gains).
        grid_gain = np.maximum(magnitude[crossings], magnitude[crossings + 1])
        crossings = crossings[grid_gain >= 0.5 * grid_gain.max()]
    for i in crossings:
        level = -np.pi + 2 * np.pi * max(branch[i], branch[i + 1])
        try:
            x = math.exp(brentq(lambda lx, level=level: phase_at(math.exp(lx)) - level,
                                log_w[i], log_w[i + 1], xtol=1e-12))
        except ValueError:
            x = w[i]
        mag = float(np.abs(response(np.atleast_1d(x)))[0])
        if mag > worst_gain:
            worst_gain, phase_crossover = mag, x
    gain_margin = math.inf if worst_gain == 0.0 else 1.0 / worst_gain

    # Gain crossovers: |L| = 1.
    log_mag = np.log(magnitude)
    phase_margin, gain_crossover = math.inf, math.nan
    for i in np.flatnonzero(np.diff(np.sign(log_mag)) != 0):
        try:
            x = math.exp(brentq(lambda lx: math.log(abs(response(np.atleast_1d(math.exp(lx)))[0])),
                                log_w[i], log_w[i + 1], xtol=1e-12))
        except ValueError:
            x = w[i]
        margin = math.degrees(phase_at(x) + np.pi)
        if margin < phase_margin:
            phase_margin, gain_crossover = margin, x

    # Sensitivity peak, refined between the grid neighbours of the largest grid value.
    sensitivity = 1.0 / np.abs(1.0 + values)
    k = int(np.argmax(sensitivity))
    lo, hi = log_w[max(k - 1, 0)], log_w[min(k + 1, len(w) - 1)]
    ms, ms_frequency = float(sensitivity[k]), float(w[k])
    if hi > lo:
        found = minimize_scalar(lambda lx: -1.0 / abs(1.0 + response(np.atleast_1d(math.exp(lx)))[0]),
                                bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
        if -found.fun > ms:
            ms, ms_frequency = float(-found.fun), math.exp(found.x)
    if k in (0, len(w) - 1):
        flags.append("sensitivity_peak_at_grid_edge")

    stable = bool(grid_phase[0] > -np.pi and gain_margin > 1.0)
    if not stable:
        flags.append("closed_loop_unstable")
        ms = math.inf
    return LoopMargins(ms=ms, gain_margin=gain_margin, phase_margin_deg=phase_margin,
                       gain_crossover=gain_crossover, phase_crossover=phase_crossover,
                       ms_frequency=ms_frequency, stable=stable, flags=tuple(flags))


def quick_peak_sensitivity(kc, ti, gain, time_constant, dead_time, w, *, model="fopdt") -> float:
    """Grid-only Ms (``inf`` when unstable) for fast searches; ``w`` is a fixed dense grid.

    Notes
    -----
    Same stability test as :func:`frequency_margins`, evaluated on the grid without refinement.
    Used inside the verdict's controller search; reported figures come from :func:`loop_margins`.
    """
    if kc * gain <= 0 or ti <= 0:
        return math.inf
    values, phase = loop_response(kc, ti, gain, time_constant, dead_time, w, model=model)
    if phase[0] <= -np.pi:
        return math.inf
    below = np.flatnonzero(phase <= -np.pi)
    if below.size and np.abs(values[below[0]]) >= 1.0:
        return math.inf
    sensitivity = 1.0 / np.abs(1.0 + values)
    k = int(np.argmax(sensitivity))
    peak = float(sensitivity[k])
    if 0 < k < len(w) - 1:  # parabola through the three grid values around the peak (uniform in log w)
        left, right = sensitivity[k - 1], sensitivity[k + 1]
        curvature = left - 2 * peak + right
        if curvature < 0:
            peak -= 0.125 * (right - left) ** 2 / curvature
    return peak


def search_grid(gain, time_constant, dead_time, ti_scale, *, model="fopdt", points_per_decade=150,
                span=(1e-3 / 4.0, 300.0)):
    """A fixed frequency grid for repeated evaluation of one process with varied controllers.

    It runs from ``span[0]`` over the slowest to ``span[1]`` over the fastest time scale among the dead
    time, the integral time and the time constant.
    """
    scales = [s for s in (dead_time, ti_scale, time_constant if model == "fopdt" else None) if s and s > 0]
    w_min = span[0] / max(scales)
    w_max = span[1] / min(scales)
    n = int(points_per_decade * np.log10(w_max / w_min)) + 2
    return np.logspace(np.log10(w_min), np.log10(w_max), n)
