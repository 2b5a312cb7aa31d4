"""Identification of one step test: the public entry point and its result object.

:func:`identify` finds the input step, runs the chosen estimator (default: output-error
least squares), chooses between a first-order-plus-dead-time (FOPDT) and an
integrating model, attaches 95 % intervals and judges the test. It never raises for
bad data: a test that cannot give a model comes back ``rejected`` with flags.
The estimators live in :mod:`mapper.identification.point_methods` and
:mod:`mapper.identification.least_squares`, the uncertainty in
:mod:`mapper.identification.uncertainty`, the checks in :mod:`mapper.identification.quality`.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from mapper.columns import FIT_VALUE_NAMES, column
from mapper.constants import MIN_AFTER_STEP_SAMPLES, MIN_BASELINE_SAMPLES, MIN_FIT_SAMPLES
from mapper.errors import DataError, IdentificationError
from mapper.identification import point_methods as est
from mapper.identification.disturbance import disturbance_flags
from mapper.identification.flags import flag_text, grade
from mapper.identification.models import simulate_fopdt, simulate_integrating
from mapper.identification.nonsteady import preceding_tail
from mapper.identification.quality import (
    StepInfo,
    assess,
    find_step,
    median,
    noise_sd,
    standard_deviation,
)
from mapper.identification.selection import choose_least_squares
from mapper.identification.uncertainty import disturbance_covariance

__all__ = ["ESTIMATORS", "FitResult", "identify", "find_step", "StepInfo"]

ESTIMATORS = ("least_squares", "graphical", "smith", "sundaresan", "area")
_POINT_METHODS = {
    "graphical": est.graphical,
    "smith": est.smith,
    "sundaresan": est.sundaresan,
    "area": est.area,
}


def _finite(x) -> float | None:
    return float(x) if x is not None and np.isfinite(x) else None


@dataclass(frozen=True, kw_only=True)
class FitResult:
    """Identified model of one step test, with 95 % intervals, quality and flags.

    Times are in seconds; ``gain`` is output units per input unit (per second for the
    integrating model). Interval bounds are None where no interval can be given (point
    methods, or a parameter the data do not determine); ``notes`` says why. Every field
    is named at construction (the record is wide; no positional construction).

    Attributes
    ----------
    model : str
        ``"fopdt"``, ``"integrating"`` or ``"none"`` (no usable model).
    method : str
        Estimator actually used.
    gain, time_constant, dead_time : float or None
        The parameters; each with ``*_lo``/``*_hi`` 95 % bounds.
    nrmse : float or None
        Root-mean-square residual over the span of the fitted response.
    quality : str
        ``"good"``, ``"suspect"`` or ``"rejected"``, from the flags
        (:func:`mapper.identification.flags.grade`), import flags included.
    flags, notes : tuple of str
        Identification flags, and one sentence per flag (import flags' sentences
        included) plus notes on the method.
    input_step, step_time : float or None
        Size (input units) and start (s) of the input move.
    y_before, y_after : float or None
        Output level before the move (the model's rest level) and at its end.
    offset : float or None
        The model's output at rest at ``input_before`` (the constant of the fit).
    input_before : float or None
        Input level before the move; the model's input deviation is taken from it.
    start_state : float or None
        Amplitude at the window's first sample of the free response the fit estimated
        (the plant still moving from earlier moves, decaying with the model's time
        constant); None when the fit assumed the plant at rest.
    residual_sd, autocorrelation : float or None
        Standard deviation and lag-one autocorrelation of the residuals.
    model_evidence : str
        Which evidence decided between the first-order and the integrating model.
    settings : dict
        How the fit was made (method, confidence, ranges, period).
    """

    model: str
    method: str
    gain: float | None = None
    gain_lo: float | None = None
    gain_hi: float | None = None
    time_constant: float | None = None
    time_constant_lo: float | None = None
    time_constant_hi: float | None = None
    dead_time: float | None = None
    dead_time_lo: float | None = None
    dead_time_hi: float | None = None
    nrmse: float | None = None
    quality: str = "rejected"
    flags: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    input_step: float | None = None
    step_time: float | None = None
    y_before: float | None = None
    y_after: float | None = None
    offset: float | None = None
    input_before: float | None = None
    start_state: float | None = None
    residual_sd: float | None = None
    autocorrelation: float | None = None
    model_evidence: str = ""
    settings: dict = field(default_factory=dict, hash=False, compare=False)

    def to_row(self) -> dict:
        """The one conversion for the store: the value columns of the column registry
        (:data:`mapper.columns.FIT_VALUE_NAMES`), ``flags`` and ``notes`` as lists of str
        and ``settings`` as a dict."""
        row = {key: getattr(self, key) for key in FIT_VALUE_NAMES}
        row["flags"] = list(self.flags)
        row["notes"] = list(self.notes)
        row["settings"] = dict(self.settings)
        return row

    @classmethod
    def from_row(cls, row: Mapping) -> FitResult:
        """The record back from a stored row (missing columns become None; ``settings``
        may be a dict or its JSON text)."""
        values: dict = {}
        for key in FIT_VALUE_NAMES:
            value = row.get(key)
            if column(key).kind == "text":
                values[key] = value if isinstance(value, str) else ("" if key == "model_evidence" else "none")
            else:
                values[key] = _finite(value) if isinstance(value, (int, float)) else None
        settings = row.get("settings") or {}
        if isinstance(settings, str):
            settings = json.loads(settings or "{}")
        for key in ("offset", "input_before"):  # stores written before these were columns
            if values[key] is None and isinstance(settings.get(key), (int, float)):
                values[key] = _finite(settings[key])
        return cls(
            **values,
            flags=_strings(row.get("flags")),
            notes=_strings(row.get("notes")),
            settings=dict(settings),
        )

    def fitted(self, t: np.ndarray, u: np.ndarray) -> np.ndarray:
        """The model's output on samples ``t, u`` of the test window (NaN everywhere when
        there is no model), the estimated starting free response included."""
        t = np.asarray(t, dtype=float)
        u = np.asarray(u, dtype=float)
        offset = self.offset if self.offset is not None else self.y_before
        gain, dead_time, tau = self.gain, self.dead_time, self.time_constant
        if self.model == "none" or gain is None or dead_time is None or offset is None or t.size < 2:
            return np.full(t.shape, np.nan)
        period = float(np.median(np.diff(t)))
        u0 = self.input_before if self.input_before is not None else float(u[0])
        if self.model == "integrating":
            out = simulate_integrating(u, period, gain, dead_time, u0=u0, y0=offset)
            if self.start_state:  # the starting ramp, in output units per second
                out = out + self.start_state * (t - t[0])
            return out
        if tau is None:
            return np.full(t.shape, np.nan)
        out = simulate_fopdt(u, period, gain, tau, dead_time, u0=u0, y0=offset)
        if self.start_state:
            out = out + self.start_state * np.exp(-(t - t[0]) / tau)
        return out


def _strings(values) -> tuple[str, ...]:
    """A stored list column (list, array or None) as a tuple of str."""
    return () if values is None else tuple(str(v) for v in values)


def _rejected(method, flags, settings, step: StepInfo | None = None, y=None, import_flags=()) -> FitResult:
    flags = tuple(dict.fromkeys(flags))
    y_before = y_after = None
    if step is not None and y is not None and y.size and step.index > 0:
        y_before = _finite(np.mean(y[: step.index]))
    if y is not None and y.size:
        y_after = _finite(np.mean(y[-max(1, y.size // 10) :]))
    return FitResult(
        model="none",
        method=method,
        quality="rejected",
        flags=flags,
        notes=tuple(flag_text(f) for f in (*import_flags, *flags)),
        input_step=_finite(step.size) if step is not None else None,
        step_time=_finite(step.time) if step is not None else None,
        y_before=y_before,
        y_after=y_after,
        settings=settings,
    )


def identify(
    t: np.ndarray,
    u: np.ndarray,
    y: np.ndarray,
    *,
    method: str = "least_squares",
    input_range: tuple[float, float] | None = None,
    output_range: tuple[float, float] | None = None,
    import_flags: Sequence[str] = (),
    preceding: tuple[np.ndarray, np.ndarray] | None = None,
    start_state: bool = True,
) -> FitResult:
    """Identify a FOPDT (or integrating) model from one open-loop step test.

    Parameters
    ----------
    t : ndarray
        Sample times in seconds on a uniform grid.
    u, y : ndarray
        Input (the stepped variable) and output (the response).
    method : str, default "least_squares"
        One of :data:`ESTIMATORS`: ``"least_squares"`` (output error on the measured
        input, with 95 % intervals), ``"graphical"`` (63.2 %), ``"smith"``,
        ``"sundaresan"`` or ``"area"``.
    input_range, output_range : (float, float), optional
        Instrument ranges, used by the clipping checks.
    import_flags : sequence of str, optional
        Flags raised when the test was imported (see :mod:`mapper.identification.flags`);
        they feed the grade and their sentences lead the notes, but are not repeated in
        ``FitResult.flags`` (the store keeps them with the test).
    preceding : (ndarray, ndarray), optional
        Times and input of the record just before the window. When the input moved
        there, the model is simulated over it so the first dead time of the window is
        explained too (the output before the window is not needed).
    start_state : bool, default True
        Estimate the starting state when the window starts with the output still
        moving. False fits every window as if the plant were at rest (the behaviour
        before this was added; kept for comparison).

    Returns
    -------
    FitResult
        Always; tests without a usable model are ``quality="rejected"``.

    Raises
    ------
    IdentificationError
        For an unknown ``method``.
    DataError
        When ``t``, ``u`` and ``y`` are not 1-D arrays of one length.

    Notes
    -----
    When the output was still moving from earlier moves as the window began, the
    least-squares fit estimates that starting state too (a free response decaying with
    the model's time constant; :mod:`mapper.identification.nonsteady`), chosen by
    Akaike's criterion or whenever the preceding input moved. The integrating model is
    chosen only on positive evidence: the first-order fit shows no settling within the
    record and its extra parameter does not lower Akaike's criterion on the same
    samples (:mod:`mapper.identification.selection`); ``model_evidence`` says which
    evidence decided. Intervals come
    from the Jacobian at the optimum, widened for AR(1) residuals
    (:func:`mapper.identification.uncertainty.disturbance_covariance`: white noise plus a
    slow wander, fitted by restricted likelihood); the time-constant interval is
    taken on a log scale so it stays positive.
    """
    if method not in ESTIMATORS:
        raise IdentificationError(
            f"unknown identification method {method!r}", hint="choose one of " + ", ".join(ESTIMATORS)
        )
    t, u, y = (np.asarray(a, dtype=float) for a in (t, u, y))
    if t.ndim != 1 or t.shape != u.shape or t.shape != y.shape:
        raise DataError(
            f"time, input and output must be 1-D arrays of one length, got shapes "
            f"{t.shape}, {u.shape}, {y.shape}",
            hint="pass one column per signal",
        )
    settings = {
        "method": method,
        "confidence": 0.95,
        "input_range": list(input_range) if input_range is not None else None,
        "output_range": list(output_range) if output_range is not None else None,
    }
    if t.size < MIN_FIT_SAMPLES:
        return _rejected(method, ["too_few_samples"], settings, import_flags=import_flags)
    if not (np.all(np.isfinite(t)) and np.all(np.isfinite(u)) and np.all(np.isfinite(y))):
        return _rejected(method, ["non_finite_samples"], settings, import_flags=import_flags)
    dt = np.diff(t)
    period = median(dt)
    if not period > 0 or np.any(dt <= 0):
        return _rejected(method, ["irregular_sampling", "too_few_samples"], settings, import_flags=import_flags)
    flags: list[str] = []
    if np.max(np.abs(dt - period)) > 0.01 * period:
        flags.append("irregular_sampling")
    settings["period"] = period
    step = find_step(t, u)
    if not step.found:
        return _rejected(method, flags + ["no_input_step"], settings, step, y, import_flags)
    if step.index < MIN_BASELINE_SAMPLES:
        return _rejected(method, flags + ["no_baseline_before_step"], settings, step, y, import_flags)
    if t.size - step.index < MIN_AFTER_STEP_SAMPLES:
        return _rejected(method, flags + ["step_at_end"], settings, step, y, import_flags)
    if np.ptp(y) == 0.0:
        return _rejected(method, flags + ["no_response"], settings, step, y, import_flags)
    try:
        with np.errstate(all="ignore"):
            history = preceding_tail(preceding, step.index, t, u) if start_state else np.empty(0)
            return _identify_step(
                t, u, y, step, method, flags, settings, input_range, output_range, import_flags, history,
                start_state,
            )
    except (ValueError, ArithmeticError, np.linalg.LinAlgError):
        # numbers beyond what the arithmetic can carry: a rejected fit with a reason, not a crash
        return _rejected(method, flags + ["numerical_failure"], settings, step, y, import_flags)


def _identify_step(
    t, u, y, step, method, flags, settings, input_range, output_range, import_flags, history,
    start_state=True,
):
    period = settings["period"]
    v_all = np.concatenate((history, u)) - step.u_before
    notes: list[str] = []
    shape = est.step_shape(t, y, step, noise_sd(y))
    start = est.smith(shape, step)
    fit = None
    used = method
    cov = None
    disturbance = None
    phi = None
    quantile = None
    evidence = ""
    from_state = False
    if method == "least_squares" or _still_ramping(shape):
        choice = choose_least_squares(t, v_all, y, history.size, step, start, period, start_state)
        if choice is None:
            return _rejected(method, flags + ["fit_failed"], settings, step, y, import_flags)
        fit, from_state, evidence = choice.fit, choice.from_state, choice.evidence
        if choice.drift:
            flags.append("drift_before_step")
        if method != "least_squares" and fit.estimate.model == "fopdt":
            fit = None  # the point method stands; the record merely did not settle
        elif method != "least_squares":
            used = "least_squares"
            notes.append(
                f"The {method} method needs a settled response; the output ramps, so an "
                "integrating model was fitted by least squares."
            )
    if fit is not None:
        e = fit.estimate
        disturbance = disturbance_covariance(fit.jacobian, fit.residuals)
        cov, phi, quantile = disturbance.covariance, disturbance.autocorrelation, disturbance.quantiles
    else:
        e = _POINT_METHODS[method](shape, step)
        if e.time_constant is None:
            # a finite dead time with no time constant: the method read tau <= 0
            reason = "time_constant_not_positive" if np.isfinite(e.dead_time) else "fit_failed"
            return _rejected(method, flags + [reason], settings, step, y, import_flags)
        notes.append("Point methods give no interval; use least_squares for 95 % intervals.")
        evidence = f"first order: the {method} method reads a first-order model off the response"
    settings["method"] = used
    if fit is not None:
        fitted = y - fit.residuals
    elif e.model == "integrating":  # pragma: no cover - point methods give first order only
        fitted = simulate_integrating(u, period, e.gain, e.dead_time, u0=step.u_before, y0=e.offset)
    else:
        fitted = simulate_fopdt(u, period, e.gain, e.time_constant, e.dead_time, u0=step.u_before, y0=e.offset)
    if e.model == "integrating":
        # the change the input caused over the record (a starting ramp is not part of it)
        response = float(simulate_integrating(u, period, e.gain, e.dead_time, u0=step.u_before)[-1])
        y_after = e.offset + response
    else:
        response = e.gain * step.size
        y_after = e.offset + response
    residuals = y - fitted
    sd = standard_deviation(residuals)
    span = float(fitted.max() - fitted.min())
    nrmse = math.sqrt(float(residuals @ residuals) / residuals.size) / span if span > 0 else None
    intervals = _intervals(e, cov, quantile)
    flags = flags + assess(
        t, u, y, step,
        model=e.model, time_constant=e.time_constant, dead_time=e.dead_time,
        response=response, residuals=residuals,
        input_range=input_range, output_range=output_range, period=period,
        start_state=from_state,
    )  # fmt: skip
    band = 4.0 * sd
    gain_lo, gain_hi = intervals["gain"]
    if abs(response) <= band or (gain_lo is not None and gain_lo <= 0.0 <= gain_hi):
        flags.append("response_below_noise")
    if not np.isfinite(e.dead_time) or e.dead_time >= t[-1] - step.time - 2 * period:
        flags.append("dead_time_beyond_record")
    if e.at_bound and e.model == "fopdt":
        flags.append("time_constant_at_bound")
    if from_state:
        flags.append("start_state_estimated")
    flags = list(dict.fromkeys(flags))
    if disturbance is not None and fit is not None:  # unexplained load changes and wander
        first = step.index + int(e.dead_time / period) + 2 if np.isfinite(e.dead_time) else step.index
        found, said = disturbance_flags(
            fit.residuals, fit.jacobian, first=first, period=period, time_constant=e.time_constant,
            response=response, noise=disturbance, fast_noise_sd=noise_sd(fit.residuals),
        )  # fmt: skip
        flags += [f for f in found if f not in flags]
        notes += said
    notes = [flag_text(f) for f in (*import_flags, *flags)] + notes
    if evidence:
        notes.append("Model choice: " + evidence + ".")
    return FitResult(
        model=e.model, method=used,
        gain=_finite(e.gain), gain_lo=gain_lo, gain_hi=gain_hi,
        time_constant=_finite(e.time_constant),
        time_constant_lo=intervals["time_constant"][0],
        time_constant_hi=intervals["time_constant"][1],
        dead_time=_finite(e.dead_time),
        dead_time_lo=intervals["dead_time"][0], dead_time_hi=intervals["dead_time"][1],
        nrmse=_finite(nrmse),
        quality=grade([*import_flags, *flags], start_state=start_state and fit is not None),
        flags=tuple(flags), notes=tuple(notes),
        input_step=_finite(step.size), step_time=_finite(step.time),
        y_before=_finite(e.offset), y_after=_finite(y_after), settings=settings,
        offset=_finite(e.offset), input_before=_finite(step.u_before),
        start_state=_finite(e.start_state) if from_state else None,
        residual_sd=_finite(sd), autocorrelation=_finite(phi) if phi is not None else None,
        model_evidence=evidence,
    )  # fmt: skip


def _still_ramping(shape) -> bool:
    """True when the last fifth of the record still carries a fifth of the change."""
    n = shape.raw.size
    if n < 10:
        return False
    tail = shape.raw[-max(3, n // 5) :]
    return abs(tail[-1] - tail[0]) > 0.2 or abs(np.mean(tail[-3:]) - np.mean(tail[:3])) > 0.2


def _intervals(e: est.Estimate, cov, z) -> dict[str, tuple[float | None, float | None]]:
    none: tuple[float | None, float | None] = (None, None)
    out: dict[str, tuple[float | None, float | None]] = {"gain": none, "time_constant": none, "dead_time": none}
    if cov is None:
        return out
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, np.inf))
    z = np.broadcast_to(np.asarray(z, dtype=float), sd.shape)  # one t point per parameter
    out["gain"] = (_finite(e.gain - z[1] * sd[1]), _finite(e.gain + z[1] * sd[1]))
    k = 2
    if e.model == "fopdt":
        assert e.time_constant is not None  # an FOPDT estimate always carries one
        rel = sd[2] / e.time_constant  # log-scale interval stays positive
        if np.isfinite(rel) and rel < 50:
            out["time_constant"] = (
                _finite(e.time_constant * math.exp(-z[2] * rel)),
                _finite(e.time_constant * math.exp(z[2] * rel)),
            )
        k = 3
    lo = max(e.dead_time - z[k] * sd[k], 0.0)
    out["dead_time"] = (_finite(lo), _finite(e.dead_time + z[k] * sd[k]))
    return out
