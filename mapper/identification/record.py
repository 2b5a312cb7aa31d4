"""Whole-record fit beside the per-move local models, and whether the local models differ.

A record with several moves gives one local model per move (each window fitted from the state
the plant was in, :func:`mapper.identification.identify.identify` with the preceding record).
:func:`fit_record` also fits ONE first-order-plus-dead-time model across the whole record (the
starting state estimated at its first sample) and tests whether the local models differ from
one another by more than their intervals allow: the evidence of nonlinearity a map needs.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.special import gammaincc

from mapper.constants import Z95
from mapper.identification.flags import flag_text
from mapper.identification.identify import FitResult, identify
from mapper.identification.nonsteady import least_squares_fopdt_from_state
from mapper.identification.uncertainty import sandwich_covariance, t_quantile

__all__ = ["RecordFit", "WholeModel", "fit_record", "homogeneity_test", "judge_file"]

SIGNIFICANCE = 0.05  # local models differ when the homogeneity test rejects at 5 % (common practice)
# least response after the dead time that shows a move's gain: a rule of thumb, set on the
# seeded long-dead-time records of tests/test_nonsteady.py
VISIBLE_TIME_CONSTANTS = 0.2
MIN_WINDOWS = 3  # fewest windows of a file that say what its moves look like


@dataclass(frozen=True)
class WholeModel:
    """One FOPDT model across the whole record, with 95 % intervals (s, output/input units)."""

    gain: float
    gain_lo: float
    gain_hi: float
    time_constant: float
    time_constant_lo: float
    time_constant_hi: float
    dead_time: float
    residual_sd: float


@dataclass(frozen=True)
class RecordFit:
    """The whole-record model, the local models, and the test of their differences.

    Attributes
    ----------
    whole : WholeModel or None
        None when the record cannot carry one model.
    local : tuple of FitResult
        One per move, in order.
    statistic, degrees_of_freedom, p_value : float
        Homogeneity (chi-square) test of the local gains.
    differ : bool
        The local models differ significantly (``p_value < 0.05``): the plant is not one
        linear model across these moves.
    """

    whole: WholeModel | None
    local: tuple[FitResult, ...]
    statistic: float
    degrees_of_freedom: int
    p_value: float
    differ: bool


def homogeneity_test(estimates: Sequence[float], sds: Sequence[float]) -> tuple[float, int]:
    """Chi-square statistic that several estimates share one value, and its degrees of freedom.

    Notes
    -----
    ``Q = sum w_i (x_i - x_w)^2`` with ``w_i = 1/sd_i^2`` and ``x_w`` the inverse-variance
    weighted mean; under one common value ``Q`` follows chi-square with ``m - 1`` degrees
    of freedom (Cochran, 1954, *Biometrics* 10, 101-129: the test of homogeneity of
    independent estimates).
    """
    x = np.asarray(estimates, dtype=float)
    w = 1.0 / np.asarray(sds, dtype=float) ** 2
    mean = float(np.sum(w * x) / np.sum(w))
    return float(np.sum(w * (x - mean) ** 2)), int(x.size - 1)


def fit_record(
    t: np.ndarray, u: np.ndarray, y: np.ndarray, move_starts: Sequence[int]
) -> RecordFit:
    """Local model per move and one whole-record model, with the test of their differences.

    Parameters
    ----------
    t, u, y : ndarray
        The whole record on a uniform grid.
    move_starts : sequence of int
        First sample of each input move, in order (from the store's segmentation).

    Returns
    -------
    RecordFit
    """
    t, u, y = (np.asarray(a, dtype=float) for a in (t, u, y))
    starts = sorted(int(i) for i in move_starts)
    bounds = [0, *starts, t.size]
    local, after_move = [], []
    period = float(np.median(np.diff(t))) if t.size > 1 else 0.0
    for i, start in enumerate(starts):
        lo, hi = bounds[i], bounds[i + 2]
        local.append(identify(t[lo:hi], u[lo:hi], y[lo:hi], preceding=(t[:lo], u[:lo])))
        after_move.append(float(t[hi - 1] - t[start]) + period)
    # the moves judged against each other: a response cut short by the next move, a gain
    # whose sign the other moves contradict
    local = [FitResult.from_row(row) for row in judge_file([r.to_row() for r in local], after_move)]
    usable = [r for r in local if r.model == "fopdt" and r.gain_lo is not None
              and r.time_constant_lo is not None and r.quality != "rejected"]
    statistic, dof, p_value = 0.0, 0, 1.0
    if len(usable) >= 2:
        def sd(r: FitResult, name: str, log: bool) -> float:
            lo, hi = getattr(r, name + "_lo"), getattr(r, name + "_hi")
            return float((math.log(hi / lo) if log else hi - lo) / (2.0 * Z95))
        # on the gains: the time constants are correlated with them within each move, and
        # the intervals do not carry that correlation, so adding both would overstate it
        gains = [float(r.gain) for r in usable if r.gain is not None]
        statistic, dof = homogeneity_test(gains, [sd(r, "gain", False) for r in usable])
        p_value = float(gammaincc(dof / 2.0, statistic / 2.0))
    return RecordFit(_whole(t, u, y, starts, usable), tuple(local), statistic, dof, p_value,
                     bool(dof > 0 and p_value < SIGNIFICANCE))


def _whole(t, u, y, starts, usable) -> WholeModel | None:
    if not starts or not usable:
        return None
    period = float(np.median(np.diff(t)))
    first = starts[0]
    guess = (float(np.median([r.time_constant for r in usable])),
             float(np.median([r.dead_time for r in usable])))
    fit = least_squares_fopdt_from_state(period, u - u[max(first - 1, 0)], y, 0, first, guess)
    if fit is None:
        return None
    e = fit.estimate
    cov, _, dof = sandwich_covariance(fit.jacobian, fit.residuals)
    z = t_quantile(dof)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, np.inf))
    assert e.time_constant is not None
    rel = sd[2] / e.time_constant
    return WholeModel(
        gain=e.gain, gain_lo=e.gain - z * sd[1], gain_hi=e.gain + z * sd[1],
        time_constant=e.time_constant,
        time_constant_lo=e.time_constant * math.exp(-z * rel),
        time_constant_hi=e.time_constant * math.exp(z * rel),
        dead_time=e.dead_time, residual_sd=float(np.std(fit.residuals)),
    )  # fmt: skip


def judge_file(rows: Sequence[dict], after_move: Sequence[float | None]) -> list[dict]:
    """The moves of one file judged against each other; rows with a flag added where due.

    Parameters
    ----------
    rows : sequence of dict
        Fit rows (:meth:`FitResult.to_row`) of the file's windows, in the file's order.
    after_move : sequence of float or None
        Seconds of each window after its own move started (None: not known).

    Returns
    -------
    list of dict
        The rows, those judged unusable with ``quality = "rejected"`` and a flag and its
        sentence added:

        - ``response_cut_by_next_move``: the window ends less than ``0.2`` time constants
          after the dead time, both the median of the file's other usable moves, so its
          own response was hardly seen (the next move came first, sometimes before the dead
          time was over);
        - ``gain_sign_against_file``: its gain's interval lies wholly on the other side of
          zero from the file's majority (a loop's steady-state gain keeps its sign over its
          range; common practice: the controller's action is set once).

    Notes
    -----
    Only files with at least three windows that carry a first-order model, a known move
    start and a gain interval clear of zero are judged, and only when one sign holds at
    least two thirds of them; the medians come from the windows of that sign. A window that
    is already rejected is left alone.
    """
    out = [dict(row) for row in rows]
    clear = [i for i, row in enumerate(out)
             if row.get("quality") != "rejected" and row.get("model") == "fopdt"
             and after_move[i] is not None and _clear_of_zero(row)]
    if len(clear) < MIN_WINDOWS:
        return out
    signs = [math.copysign(1.0, out[i]["gain"]) for i in clear]
    up, down = signs.count(1.0), signs.count(-1.0)
    if max(up, down) < 2 * min(up, down):  # no clear majority: the file cannot judge its moves
        return out
    majority = 1.0 if up > down else -1.0
    typical = [i for i, sign in zip(clear, signs) if sign == majority]
    dead_time = float(np.median([out[i]["dead_time"] for i in typical]))
    time_constant = float(np.median([out[i]["time_constant"] for i in typical]))
    for i, row in enumerate(out):
        if row.get("quality") == "rejected":
            continue
        seen = after_move[i]
        if seen is not None and seen - dead_time < VISIBLE_TIME_CONSTANTS * time_constant:
            _reject(row, "response_cut_by_next_move",
                    f"Only {max(seen - dead_time, 0.0):.3g} s of response after a dead time of about "
                    f"{dead_time:.3g} s (time constant about {time_constant:.3g} s in this file's moves).")
        elif _clear_of_zero(row) and math.copysign(1.0, row["gain"]) != majority:
            _reject(row, "gain_sign_against_file",
                    f"Gain {row['gain']:.3g} against {'positive' if majority > 0 else 'negative'} gains in "
                    f"{len(typical)} other moves of this file.")
    return out


def _clear_of_zero(row: dict) -> bool:
    lo, hi, gain = row.get("gain_lo"), row.get("gain_hi"), row.get("gain")
    return (gain is not None and lo is not None and hi is not None
            and (lo > 0.0 or hi < 0.0) and row.get("dead_time") is not None
            and row.get("time_constant") is not None)


def _reject(row: dict, flag: str, detail: str) -> None:
    row["flags"] = [*row.get("flags", []), flag]
    row["notes"] = [*row.get("notes", []), flag_text(flag) + " " + detail]
    row["quality"] = "rejected"
