"""Which least-squares model a test supports: from rest or from a moving start, FOPDT or integrating.

Two choices are made on the same window by an information criterion, and the evidence that
decided is written out for the reader:

* whether the plant was at rest when the test started (the fit from rest) or still moving
  from earlier moves (the fit with the starting state, :mod:`mapper.identification.nonsteady`);
* whether the plant is self-regulating (first order plus dead time) or integrating. The
  integrating model is chosen only on positive evidence: the first-order fit cannot show a
  settling within the record, and the first-order model's extra parameter does not earn
  its keep by Akaike's criterion (Akaike, 1974) on the same samples.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from mapper.constants import DRIFT_FRACTION, MIN_BASELINE_SAMPLES
from mapper.identification import least_squares as est
from mapper.identification.nonsteady import (
    least_squares_fopdt_from_state,
    least_squares_integrating_from_state,
)
from mapper.identification.point_methods import Estimate
from mapper.identification.quality import StepInfo
from mapper.identification.uncertainty import residual_autocorrelation

__all__ = ["Choice", "aic", "choose_least_squares", "baseline_moving"]

BASELINE_TREND_SDS = 3.0  # a baseline slope beyond 3 of its sd is a moving start (common practice)
# AIC difference taken as clear support for one model over another (Burnham & Anderson, 2002,
# sec. 2.6: differences over about 4-7 mean considerably less support for the worse model)
DRIFT_EVIDENCE = 4.0
INTEGRATING_EVIDENCE = 4.0  # same scale, for the integrating model over a bending first order
START_EVIDENCE = 4.0  # same scale, for a moving start over a start from rest
# a first-order response with a time constant up to 3 record lengths still bends visibly over
# the record (its slope falls to exp(-1/3) = 72 %); a straight ramp beyond that is an integrator
BENDING_RECORDS = 3.0


@dataclass(frozen=True)
class Choice:
    """The least-squares fit kept, whether it estimated the starting state, and why."""

    fit: est.LeastSquaresFit
    from_state: bool
    evidence: str
    drift: bool = False


def aic(fit: est.LeastSquaresFit, inflation: float = 1.0) -> float:
    """Akaike's criterion of a least-squares fit, ``n ln(RSS/n) / c + 2p`` (QAIC for ``c > 1``).

    Notes
    -----
    For Gaussian errors of unknown variance (Akaike, 1974; Burnham & Anderson, *Model
    Selection and Multimodel Inference*, 2002, eq. 2.13). ``p`` counts the fitted
    parameters (the Jacobian's columns). Residuals of sampled process data are
    autocorrelated, so the log-likelihood is divided by the variance inflation ``c``
    (QAIC, Burnham & Anderson sec. 2.5), the same ``c`` for every model compared; see
    :func:`inflation`. Only differences on the same samples mean anything.
    """
    n, p = fit.jacobian.shape
    rss = max(float(fit.estimate.rss), 1e-300)
    return n * math.log(rss / n) / inflation + 2.0 * p


def inflation(fit: est.LeastSquaresFit) -> float:
    """Variance inflation ``(1 + phi)/(1 - phi)`` of AR(1) residuals (at least 1)."""
    phi = residual_autocorrelation(fit.residuals, fit.jacobian.shape[1])
    return (1.0 + phi) / (1.0 - phi)


def baseline_moving(t: np.ndarray, residuals: np.ndarray, index: int) -> bool:
    """True when the residuals of a fit from rest trend before the step (a moving start)."""
    if index < 2 * MIN_BASELINE_SAMPLES:
        return False
    tb = t[:index] - t[:index].mean()
    rb = residuals[:index] - residuals[:index].mean()
    stt = float(tb @ tb)
    slope = float(tb @ rb) / stt
    rest = rb - slope * tb
    slope_sd = math.sqrt(float(rest @ rest) / max(index - 2, 1) / stt)
    return abs(slope) > BASELINE_TREND_SDS * slope_sd


def choose_least_squares(
    t: np.ndarray,
    v: np.ndarray,
    y: np.ndarray,
    history: int,
    step: StepInfo,
    start: Estimate,
    period: float,
    start_state: bool = True,
) -> Choice | None:
    """Fit from rest and, where the start was moving, with the starting state; then FOPDT
    against integrating. ``v`` holds ``history`` samples of preceding input before the window."""
    v_window = v[history:]
    tau = start.time_constant
    guess = (float(tau), float(start.dead_time)) if step.n_moves == 1 and tau else None
    rest = est.least_squares_fopdt(period, v_window, y, step.index, guess)
    if rest is None:
        return None
    fit, from_state = rest, False
    why = ""
    drift = False
    if start_state and (history > 0 or baseline_moving(t, rest.residuals, step.index)):
        e = rest.estimate
        guess = (float(e.time_constant or period), e.dead_time)
        moving = least_squares_fopdt_from_state(period, v, y, history, step.index, guess)
        # the rival explanation: a drift that goes on through the test (not a decay)
        line = least_squares_fopdt_from_state(period, v, y, history, step.index, guess, free="ramp")
        c = inflation(moving) if moving is not None else 1.0
        if moving is not None and line is not None:
            # a drift worth a flag: clearly the better explanation, and large enough to
            # matter (carried over the window, over 10 % of the response; common practice)
            size = abs(line.estimate.gain * step.size)
            drift = (aic(line, c) < aic(moving, c) - DRIFT_EVIDENCE
                     and abs(line.estimate.start_state) > DRIFT_FRACTION * size)
        if moving is not None:
            delta = aic(moving, c) - aic(rest, c)
            # without a known earlier move, the start must clearly be moving and look like a
            # decay: a straight drift fitting as well is wander, not a starting state
            decays = line is None or aic(moving, c) <= aic(line, c)
            if history > 0 or (delta < -START_EVIDENCE and decays):
                fit, from_state = moving, True
                reason = "the input moved just before the window" if history > 0 else "the baseline still moved"
                why = f"starting state estimated ({reason}; AIC change {delta:+.1f} against a start from rest)"
            else:
                why = f"start from rest kept (AIC favours it by {delta:.1f} over estimating the starting state)"
    e = fit.estimate
    record_after = period * (y.size - step.index)
    assert e.time_constant is not None
    if not (e.at_bound or e.time_constant > record_after - e.dead_time):
        evidence = (
            f"first order: the response settles within the record (time constant "
            f"{e.time_constant:.3g} s against {record_after:.3g} s after the step)"
        )
        return Choice(fit, from_state, _join(evidence, why), drift)
    if from_state:
        ramp = least_squares_integrating_from_state(period, v, y, history, step.index, e.dead_time)
    else:
        ramp = est.least_squares_integrating(period, v_window, y, step.index)
    if ramp is None:
        return Choice(fit, from_state, _join("first order: no integrating fit possible", why), drift)
    # positive evidence: the ramp stays straight where any first-order response with a
    # time constant up to a few records would visibly bend
    tau_max = BENDING_RECORDS * record_after
    guess = (min(e.time_constant, tau_max), e.dead_time)
    if from_state:
        bent = least_squares_fopdt_from_state(period, v, y, history, step.index, guess, tau_max=tau_max)
    else:
        bent = est.least_squares_fopdt(period, v_window, y, step.index, guess, tau_max=tau_max)
    c = inflation(fit)
    delta = aic(ramp, c) - aic(bent, c) if bent is not None else -math.inf
    if delta < -INTEGRATING_EVIDENCE:
        evidence = (
            f"integrating: the output ramps on without bending; any first-order response with a "
            f"time constant up to {BENDING_RECORDS:g} records would bend (AIC favours "
            f"integrating by {-delta:.1f})"
        )
        return Choice(ramp, from_state, _join(evidence, why), drift)
    evidence = (
        f"first order, not settled: the record cannot tell a slow first-order response from a "
        f"ramp (AIC {delta:+.1f} for integrating against a first order with a time constant "
        f"up to {BENDING_RECORDS:g} records), so the integrating model lacks positive evidence"
    )
    return Choice(fit, from_state, _join(evidence, why), drift)


def _join(evidence: str, why: str) -> str:
    return f"{evidence}; {why}" if why else evidence
