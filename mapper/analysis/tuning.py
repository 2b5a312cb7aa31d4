"""PI tuning rules, controller settings in the forms engineers type, and loop margins.

This module owns the controller side of the job: published PI rules for first-order-plus-dead-time
(FOPDT) and integrating-plus-dead-time processes, conversion of a controller to the settings an
engineer types (gain, integral time in seconds and minutes, proportional band), robustness margins
from the exact frequency response of the loop (dead time as ``exp(-j w theta)``, no Padé
approximation; computed in :mod:`mapper.analysis.margins` and re-exported here), and the ratio of
integrated errors ``ti/kc`` (the verdict judges speed by the integrated *absolute* error after a load
step instead, simulated in :mod:`mapper.analysis.closedloop`).

Conventions: time in seconds, process gain in output units per input unit (integrating gain in
output units per second per input unit), controller gain ``kc`` in input units per output unit,
frequencies in rad/s. The controller is the ideal (parallel) PI ``C(s) = kc (1 + 1/(ti s))``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from mapper.analysis.margins import check_process
from mapper.errors import DataError

TUNING_RULES = ("simc", "lambda")


# ---------------------------------------------------------------------------------------------
# Tuning rules
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class PITuning:
    """A PI controller and how it was obtained.

    Attributes
    ----------
    kc : float
        Controller gain, input units per output unit. Its sign follows the process gain (a positive
        process gain needs a reverse-acting controller).
    ti : float
        Integral (reset) time, s.
    rule : str
        Tuning rule that produced it (``"simc"``, ``"lambda"``, or ``"given"``).
    closed_loop_time : float or None
        Desired closed-loop time constant (tau_c or lambda) used by the rule, s.
    notes : tuple of str
        Sentences about choices made (for example a floor on the closed-loop time).
    """

    kc: float
    ti: float
    rule: str = "given"
    closed_loop_time: float | None = None
    notes: tuple[str, ...] = field(default=())

    @property
    def ti_min(self) -> float:
        """Integral time in minutes."""
        return self.ti / 60.0

    @property
    def integral_gain(self) -> float:
        """Integral gain ``|kc| / ti`` (1/s times input per output units)."""
        return abs(self.kc) / self.ti

    def settings(self, *, input_range=None, output_range=None) -> dict:
        """The controller in the forms engineers type.

        Parameters
        ----------
        input_range, output_range : pair of float, optional
            Instrument ranges of the process input (controller output) and of the process output
            (measurement). When both are given the gain is also stated dimensionless (%/%) and as a
            proportional band.

        Returns
        -------
        dict
            ``kc``, ``ti`` (s), ``ti_min``, ``action`` (``"reverse"`` for a positive process gain,
            common practice), ``rule``, ``closed_loop_time`` and, with ranges,
            ``kc_dimensionless`` and ``proportional_band`` (%).

        Notes
        -----
        With spans ``S_in`` and ``S_out``, a controller working in percent of span has gain
        ``kc * S_out / S_in`` and proportional band ``100 / |kc_dimensionless|`` % (common practice).
        """
        out = {
            "kc": float(self.kc),
            "ti": float(self.ti),
            "ti_min": float(self.ti_min),
            "action": "reverse" if self.kc > 0 else "direct",
            "rule": self.rule,
            "closed_loop_time": None if self.closed_loop_time is None else float(self.closed_loop_time),
        }
        dimensionless = dimensionless_gain(self.kc, input_range=input_range, output_range=output_range)
        if dimensionless is not None:
            out["kc_dimensionless"] = dimensionless
            out["proportional_band"] = 100.0 / abs(dimensionless)
        return out


def _span(value, name: str) -> float | None:
    if value is None:
        return None
    try:
        low, high = (float(v) for v in value)
    except (TypeError, ValueError) as exc:
        raise DataError(
            f"{name} must be a pair [low, high]; got {value!r}",
            hint="give the instrument range as two numbers, e.g. [0, 100]",
        ) from exc
    if not math.isfinite(low) or not math.isfinite(high) or high == low:
        raise DataError(f"{name} {value!r} has no usable span", hint="give two different finite numbers")
    return abs(high - low)


def dimensionless_gain(kc: float, *, input_range=None, output_range=None) -> float | None:
    """Controller gain in percent of output span per percent of measurement span, or None.

    Parameters
    ----------
    kc : float
        Controller gain in engineering units (process input units per process output unit).
    input_range, output_range : pair of float, optional
        Instrument ranges of the process input and output. Both are needed.
    """
    span_in = _span(input_range, "input_range")
    span_out = _span(output_range, "output_range")
    if span_in is None or span_out is None:
        return None
    return float(kc) * span_out / span_in


def simc_pi(gain: float, time_constant: float | None, dead_time: float, *,
            closed_loop_time: float | None = None, model: str = "fopdt") -> PITuning:
    """SIMC PI settings for an FOPDT or integrating-plus-dead-time process.

    Parameters
    ----------
    gain : float
        Process gain (integrating gain for ``model="integrating"``).
    time_constant : float or None
        Time constant, s (ignored for integrating processes).
    dead_time : float
        Dead time, s.
    closed_loop_time : float, optional
        Desired closed-loop time constant tau_c, s. Default ``dead_time`` (tight but robust control).
    model : {"fopdt", "integrating"}

    Returns
    -------
    PITuning

    Raises
    ------
    DataError
        When the process parameters cannot be tuned (zero gain, negative times) or when neither
        dead time nor ``closed_loop_time`` gives a positive tau_c + theta.

    Notes
    -----
    Skogestad's SIMC rules (Skogestad, 2003): ``kc = tau / (K (tau_c + theta))``,
    ``ti = min(tau, 4 (tau_c + theta))``; integrating: ``kc = 1 / (k' (tau_c + theta))``,
    ``ti = 4 (tau_c + theta)``.

    References
    ----------
    S. Skogestad, "Simple analytic rules for model reduction and PID controller tuning",
    Journal of Process Control 13 (2003) 291-309.
    """
    check_process(gain, time_constant, dead_time, model)
    tau_c = dead_time if closed_loop_time is None else float(closed_loop_time)
    total = tau_c + dead_time
    if not total > 0:
        raise DataError(
            "SIMC needs tau_c + dead time > 0; the dead time is 0 and no closed-loop time was given",
            hint="pass closed_loop_time (desired closed-loop time constant, s)",
        )
    if model == "integrating":
        return PITuning(kc=1.0 / (gain * total), ti=4.0 * total, rule="simc", closed_loop_time=tau_c)
    assert time_constant is not None  # check_process demands one for an FOPDT model
    return PITuning(kc=time_constant / (gain * total), ti=min(time_constant, 4.0 * total), rule="simc",
                    closed_loop_time=tau_c)


def lambda_pi(gain: float, time_constant: float | None, dead_time: float, *,
              closed_loop_time: float | None = None, model: str = "fopdt") -> PITuning:
    """IMC / lambda PI settings for an FOPDT or integrating-plus-dead-time process.

    Parameters
    ----------
    gain, time_constant, dead_time, model
        As :func:`simc_pi`.
    closed_loop_time : float, optional
        Lambda, the desired closed-loop time constant, s. Default: the larger of the time constant
        and three dead times for FOPDT (a common conservative choice), three dead times for
        integrating processes (common practice).

    Returns
    -------
    PITuning

    Notes
    -----
    FOPDT: ``kc = tau / (K (lambda + theta))``, ``ti = tau`` -- the IMC PI rule of Rivera, Morari &
    Skogestad (1986) with the dead time counted into the closed-loop time, as used in lambda tuning
    (Chien & Fruehauf, 1990). Integrating: ``kc = (2 lambda + theta) / (k' (lambda + theta)^2)``,
    ``ti = 2 lambda + theta`` (Chien & Fruehauf, 1990; from memory).

    References
    ----------
    D. E. Rivera, M. Morari, S. Skogestad, "Internal model control. 4. PID controller design",
    Ind. Eng. Chem. Process Des. Dev. 25 (1986) 252-265.
    I.-L. Chien, P. S. Fruehauf, "Consider IMC tuning to improve controller performance",
    Chemical Engineering Progress 86 (1990) 33-41.
    """
    check_process(gain, time_constant, dead_time, model)
    tau = float("nan") if time_constant is None else time_constant  # None only for integrating models
    if closed_loop_time is None:
        lam = 3.0 * dead_time if model == "integrating" else max(tau, 3.0 * dead_time)
    else:
        lam = float(closed_loop_time)
    if not lam + dead_time > 0:
        raise DataError("lambda tuning needs lambda + dead time > 0",
                        hint="pass closed_loop_time (lambda, s)")
    if model == "integrating":
        reset = 2.0 * lam + dead_time
        return PITuning(kc=reset / (gain * (lam + dead_time) ** 2), ti=reset, rule="lambda", closed_loop_time=lam)
    return PITuning(kc=tau / (gain * (lam + dead_time)), ti=tau, rule="lambda",
                    closed_loop_time=lam)


def tune(rule: str, gain, time_constant, dead_time, *, closed_loop_time=None, model="fopdt") -> PITuning:
    """Dispatch to a tuning rule by name (``"simc"`` or ``"lambda"``)."""
    if rule == "simc":
        return simc_pi(gain, time_constant, dead_time, closed_loop_time=closed_loop_time, model=model)
    if rule == "lambda":
        return lambda_pi(gain, time_constant, dead_time, closed_loop_time=closed_loop_time, model=model)
    raise DataError(f"unknown tuning rule {rule!r}", hint=f"use one of {TUNING_RULES}")


def slowdown(local: PITuning, given: PITuning) -> float:
    """Ratio of integrated errors after a load step, ``given`` against ``local``.

    A fair speed measure only for well-damped loops (it rewards oscillation); the verdict uses the
    integrated absolute error from a simulation instead (:mod:`mapper.analysis.controller_search`).

    Returns
    -------
    float
        ``(|kc|/ti of local) / (|kc|/ti of given)``; above 1 the given controller is slower.

    Notes
    -----
    For a PI loop the integrated error after a unit step load disturbance is ``IE = ti / kc``
    (Åström & Hägglund, *PID Controllers*, 1995), so the ratio of integral gains is the ratio of
    integrated errors: the given controller leaves this many times more error behind than the
    locally tuned one.
    """
    return local.integral_gain / given.integral_gain
