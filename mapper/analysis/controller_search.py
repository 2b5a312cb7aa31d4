"""Search for one PI controller that serves several operating points, judged in the time domain.

This module owns the measures the verdict judges a controller by, and the search over controllers:
at every operating point the maximum sensitivity Ms (exact frequency response) and the integrated
absolute error (IAE) after a unit load step at the plant input, relative to a locally tuned controller
(simulated with the exact dead time in :mod:`mapper.analysis.closedloop`). A controller serves a set of
points when at every point Ms and the IAE ratio stay within their limits. The single-controller search
and the schedule bands both use :func:`evaluate`, so they judge by the same measures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mapper.analysis.closedloop import sample_period, simulate_loops
from mapper.analysis.margins import loop_margins, search_grid
from mapper.analysis.tuning import PITuning

__all__ = ["OperatingPoint", "CandidateTable", "make_points", "evaluate", "measure", "search", "score"]

_SIMULATE_MS = 1.2      # above this many times the Ms limit a candidate fails anyway; its IAE is not simulated
_IAE_CAP = 1.5          # stop simulating once the IAE ratio passes this many times its limit
_TOLERANCE = 1e-6       # relative slack when comparing with a limit
_REFINE_BELOW = 1.15    # a lattice best scoring above this cannot be polished under 1 (lattice steps 12-15 %)
_POINTS_PER_DECADE = 30 # search grid; the peak is refined by a parabola and reported figures are exact


@dataclass(frozen=True)
class OperatingPoint:
    """One operating point: process from the map, its local tuning and that tuning's load response.

    Attributes
    ----------
    level : float
    gain, time_constant, dead_time : float
        Process there (``time_constant`` None for an integrating model).
    model : {"fopdt", "integrating"}
    local : PITuning
        Controller tuned at this point alone (the reference for the IAE ratio).
    grid : ndarray
        Fixed frequency grid (rad/s) for fast Ms evaluation.
    period : float
        Sample period of the closed-loop simulation, s.
    local_iae, local_peak : float
        IAE and peak deviation of the local controller after a unit load step.
    plant_response, plant_phase : ndarray
        Exact process frequency response on ``grid`` and its continuous phase less pi/2, so that
        ``L = plant_response * kc (1 + 1/(j w ti))`` and ``arg L = plant_phase + arctan(w ti)``.
    """

    level: float
    gain: float
    time_constant: float | None
    dead_time: float
    model: str
    local: PITuning
    grid: np.ndarray
    period: float
    local_iae: float
    local_peak: float
    plant_response: np.ndarray
    plant_phase: np.ndarray


def make_points(processes, locals_) -> list[OperatingPoint]:
    """Operating points from ``(level, gain, time_constant, dead_time, model)`` and local tunings.

    The local controllers' load responses are simulated together, in one batch.
    """
    processes, locals_ = list(processes), list(locals_)
    periods = [float(sample_period(theta, local.closed_loop_time if local.closed_loop_time is not None
                                   else max(theta, 1e-9)))
               for (_, _, _, theta, _), local in zip(processes, locals_)]
    taus = [np.nan if tau is None else tau for (_, _, tau, _, _) in processes]
    reference = simulate_loops([lt.kc for lt in locals_], [lt.ti for lt in locals_],
                               [p[1] for p in processes], taus, [p[3] for p in processes], periods,
                               integrating=[p[4] == "integrating" for p in processes])
    points = []
    for (level, gain, tau, theta, model), local, period, iae, peak in zip(processes, locals_, periods,
                                                                        reference.iae, reference.peak):
        grid = search_grid(gain, tau, theta, local.ti, model=model, points_per_decade=_POINTS_PER_DECADE,
                           span=(1e-2, 30.0))
        jw = 1j * grid
        if model == "integrating":
            values, phase = gain * np.exp(-jw * theta) / jw, -np.pi / 2 - grid * theta
        else:
            values, phase = gain * np.exp(-jw * theta) / (tau * jw + 1.0), -np.arctan(grid * tau) - grid * theta
        # The PI adds arctan(w ti) - pi/2 to the phase; the -pi/2 is kept with the plant.
        points.append(OperatingPoint(level=level, gain=gain, time_constant=tau, dead_time=theta, model=model,
                                     local=local, grid=grid, period=period, local_iae=float(iae),
                                     local_peak=float(peak), plant_response=values,
                                     plant_phase=phase - np.pi / 2))
    return points


def peak_sensitivities(kc, ti, point: OperatingPoint) -> np.ndarray:
    """Grid Ms of many PI controllers on one point (``inf`` when the closed loop is unstable).

    Notes
    -----
    Same stability test and parabolic peak refinement as
    :func:`mapper.analysis.margins.quick_peak_sensitivity`, vectorised over controllers.
    """
    kc = np.asarray(kc, dtype=float)[:, None]
    ti = np.asarray(ti, dtype=float)[:, None]
    w = point.grid
    values = point.plant_response * (kc * (1.0 + 1.0 / (1j * w * ti)))
    phase = point.plant_phase + np.arctan(w * ti)
    magnitude = np.abs(values)
    below = phase <= -np.pi
    first = np.argmax(below, axis=1)
    rows = np.arange(kc.shape[0])
    unstable = (below.any(axis=1) & (magnitude[rows, first] >= 1.0)) | (phase[:, 0] <= -np.pi)
    unstable |= (kc[:, 0] * point.gain <= 0) | (ti[:, 0] <= 0)
    sensitivity = 1.0 / np.abs(1.0 + values)
    k = np.argmax(sensitivity, axis=1)
    peak = sensitivity[rows, k]
    inner = (k > 0) & (k < sensitivity.shape[1] - 1)
    left = sensitivity[rows, np.maximum(k - 1, 0)]
    right = sensitivity[rows, np.minimum(k + 1, sensitivity.shape[1] - 1)]
    curvature = left - 2 * peak + right
    bend = inner & (curvature < 0)
    peak = np.where(bend, peak - 0.125 * (right - left) ** 2 / np.where(bend, curvature, -1.0), peak)
    return np.where(unstable, np.inf, peak)


def evaluate(kc, ti, points, *, ms_max: float = 2.0, slowdown_max: float = 2.0, capped: bool = True):
    """Ms and IAE ratio of every candidate controller at every point.

    Parameters
    ----------
    kc, ti : array
        Candidate controllers (``C`` of them).
    points : list of OperatingPoint
    ms_max, slowdown_max : float
        Limits. With ``capped`` a loop is simulated only until its IAE ratio passes 1.5 times its
        limit (the ratio is then a lower bound), and not at all when its grid Ms is over 1.2 times its
        limit (ratio NaN): such a candidate fails whatever its IAE, and every candidate that could
        serve is simulated in full.

    Returns
    -------
    (ndarray, ndarray)
        ``ms`` and ``iae_ratio``, each ``(C, P)``; ``iae_ratio`` is NaN where not simulated.
    """
    kc, ti = np.atleast_1d(np.asarray(kc, float)), np.atleast_1d(np.asarray(ti, float))
    ms = np.column_stack([peak_sensitivities(kc, ti, p) for p in points])
    ratio = np.full(ms.shape, np.nan)
    rows, cols = np.nonzero(ms <= _SIMULATE_MS * ms_max) if capped else np.nonzero(np.isfinite(ms))
    if rows.size:
        pick = [points[j] for j in cols]
        local_iae = np.array([p.local_iae for p in pick])
        result = simulate_loops(kc[rows], ti[rows], [p.gain for p in pick],
                                [np.nan if p.time_constant is None else p.time_constant for p in pick],
                                [p.dead_time for p in pick], [p.period for p in pick],
                                integrating=[p.model == "integrating" for p in pick],
                                iae_cap=_IAE_CAP * slowdown_max * local_iae if capped else None)
        ratio[rows, cols] = result.iae / local_iae
    return ms, ratio


def score(ms, ratio, ms_max, slowdown_max) -> np.ndarray:
    """Worst over points (last axis) of max(Ms / limit, IAE ratio / limit); <= 1 means it serves."""
    part = np.fmax(ms / ms_max, ratio / slowdown_max)
    return np.max(part, axis=-1)


@dataclass(frozen=True)
class CandidateTable:
    """A lattice of controllers evaluated once at every point, shared by every search."""

    kc: np.ndarray
    ti: np.ndarray
    ms: np.ndarray
    ratio: np.ndarray

    @classmethod
    def build(cls, points, ms_max: float, slowdown_max: float) -> CandidateTable:
        """Log-spaced lattice (steps of about 15 % in gain, 20 % in integral time) over gains 0.2-1.2
        times and integral times 0.7-3 times the local ones.

        The local tunings themselves are added, so every point can always be served by its own.
        """
        kcs = np.array([abs(p.local.kc) for p in points])
        tis = np.array([p.local.ti for p in points])
        sign = math.copysign(1.0, points[0].local.kc)
        kc_lo, kc_hi = 0.2 * kcs.min(), 1.2 * kcs.max()
        ti_lo, ti_hi = 0.7 * tis.min(), 3.0 * tis.max()
        n_kc = int(np.clip(math.ceil(math.log(kc_hi / kc_lo) / math.log(1.15)), 8, 30))
        n_ti = int(np.clip(math.ceil(math.log(ti_hi / ti_lo) / math.log(1.2)), 6, 16))
        grid_kc, grid_ti = np.meshgrid(np.geomspace(kc_lo, kc_hi, n_kc), np.geomspace(ti_lo, ti_hi, n_ti))
        kc = sign * np.concatenate([grid_kc.ravel(), kcs])
        ti = np.concatenate([grid_ti.ravel(), tis])
        ms, ratio = evaluate(kc, ti, points, ms_max=ms_max, slowdown_max=slowdown_max)
        return cls(kc=kc, ti=ti, ms=ms, ratio=ratio)

    def best(self, columns, ms_max, slowdown_max) -> tuple[int, float]:
        """Index and score of the best lattice controller for the points ``columns``."""
        worst = score(self.ms[:, columns], self.ratio[:, columns], ms_max, slowdown_max)
        i = int(np.nanargmin(worst))
        return i, float(worst[i])


def search(points, ms_max: float, slowdown_max: float, *, table: CandidateTable | None = None,
           columns=None, refine: bool = True) -> tuple[PITuning, float]:
    """Best single PI controller for ``points`` (minimax of the limit ratios).

    Parameters
    ----------
    points : list of OperatingPoint
        All points of the table (``columns`` selects the ones to serve; default all).
    ms_max, slowdown_max : float
    table : CandidateTable, optional
        Lattice evaluated earlier on the same points (built when not given).
    refine : bool
        When no lattice controller serves but the best comes within 15 % of the limits, polish it by
        a pattern search.

    Returns
    -------
    (PITuning, float)
        The controller and its score (<= 1: it serves every point).

    Notes
    -----
    A lattice search followed by a compass (pattern) search in log(kc), log(ti) with shrinking steps
    (Hooke & Jeeves, 1961; Kolda, Lewis & Torczon, 2003), each step's eight neighbours evaluated
    together. The limits are aimed at 0.1 % inside so the refined figures reported later stay within.
    """
    table = table or CandidateTable.build(points, ms_max, slowdown_max)
    columns = list(range(len(points))) if columns is None else list(columns)
    ms_aim, slow_aim = ms_max * 0.999, slowdown_max * 0.999
    index, best = table.best(columns, ms_aim, slow_aim)
    kc, ti = float(table.kc[index]), float(table.ti[index])
    if refine and 1.0 < best <= _REFINE_BELOW:
        chosen = [points[j] for j in columns]
        sign = math.copysign(1.0, kc)
        x = np.log([abs(kc), ti])
        step = np.log(1.15)
        moves = np.array([(i, j) for i in (-1, 0, 1) for j in (-1, 0, 1) if (i, j) != (0, 0)], dtype=float)
        while step > np.log(1.005) and best > 1.0:
            trial = x + step * moves
            ms, ratio = evaluate(sign * np.exp(trial[:, 0]), np.exp(trial[:, 1]), chosen, ms_max=ms_max,
                                 slowdown_max=slowdown_max)
            worst = score(ms, ratio, ms_aim, slow_aim)
            k = int(np.nanargmin(worst)) if np.isfinite(worst).any() else -1
            if k >= 0 and worst[k] < best:
                best, x = float(worst[k]), trial[k]
            else:
                step *= 0.5
        kc, ti = sign * float(np.exp(x[0])), float(np.exp(x[1]))
    return PITuning(kc=kc, ti=ti, rule="single controller search"), best


def measure(kc, ti, points) -> list[dict]:
    """Reported figures of given controllers at points (one controller per point, or one for all).

    Margins come from the exact frequency response (:func:`mapper.analysis.margins.loop_margins`);
    the IAE and peak ratios from an uncapped simulation after a unit load step, the overshoot from a
    unit setpoint step.

    Returns
    -------
    list of dict
        ``level, kc, ti, ms, gain_margin, phase_margin_deg, slowdown, iae_ratio, peak_ratio,
        overshoot`` plus the process and the local tuning there.
    """
    n = len(points)
    kc = np.broadcast_to(np.asarray(kc, float), (n,))
    ti = np.broadcast_to(np.asarray(ti, float), (n,))
    args = ([p.gain for p in points], [np.nan if p.time_constant is None else p.time_constant for p in points],
            [p.dead_time for p in points], [p.period for p in points])
    integrating = [p.model == "integrating" for p in points]
    load = simulate_loops(kc, ti, *args, integrating=integrating)
    step = simulate_loops(kc, ti, *args, integrating=integrating, setpoint=True)
    rows = []
    for i, p in enumerate(points):
        margins = loop_margins(float(kc[i]), float(ti[i]), p.gain, p.time_constant, p.dead_time, model=p.model,
                               points_per_decade=100)
        stable = math.isfinite(margins.ms) and bool(load.settled[i])
        ratio = float(load.iae[i] / p.local_iae) if stable else math.inf
        rows.append({"level": p.level, "kc": float(kc[i]), "ti": float(ti[i]), "ms": margins.ms,
                     "gain_margin": margins.gain_margin, "phase_margin_deg": margins.phase_margin_deg,
                     "slowdown": ratio, "iae_ratio": ratio,
                     "peak_ratio": float(load.peak[i] / p.local_peak) if stable else math.inf,
                     "overshoot": float(step.overshoot[i]) if stable else math.inf,
                     "gain": p.gain, "time_constant": p.time_constant, "dead_time": p.dead_time,
                     "kc_local": p.local.kc, "ti_local": p.local.ti})
    return rows


def serves(rows, ms_max, slowdown_max) -> bool:
    """Every row within both limits (with a relative slack of 1e-6)."""
    return all(r["ms"] <= ms_max * (1 + _TOLERANCE) and r["iae_ratio"] <= slowdown_max * (1 + _TOLERANCE)
               for r in rows)
