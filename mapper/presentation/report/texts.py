"""Fixed texts of the report: the methods with their published sources and the safety cautions."""

from __future__ import annotations

import re

METHOD_NOTES: tuple[tuple[str, str], ...] = (
    ("Graphical 63.2 % method",
     "Gain is the change in output over the change in input; dead time runs from the input "
     "change to the first sustained output move; the time constant from there to 63.2 % of the "
     "change (common practice in the trade)."),
    ("Two-point method, 28.3 % / 63.2 %",
     "Smith, C. L. (1972), Digital Computer Process Control, Intext. Time constant and dead time "
     "from the times at which the response reaches two fractions of its change."),
    ("Two-point method, 35.3 % / 85.3 %",
     "Sundaresan, K. R. and Krishnaswamy, P. R. (1978), Estimation of time delay, time constant "
     "parameters in time, frequency and Laplace domains, Can. J. Chem. Eng. 56, 257-262. "
     "Coefficients are computed exactly from the two fractions rather than the rounded ones."),
    ("Area method",
     "Åström, K. J. and Hägglund, T. (1995), PID Controllers: Theory, Design and Tuning, 2nd ed., "
     "ISA. Integrals of the response only, hence robust to noise."),
    ("Least squares, output error (default)",
     "The model is driven by the measured input and its output compared with the measured "
     "output, so ramps and imperfect steps are handled; discretised exactly under a zero-order "
     "hold with fractional dead time. Intervals are 95 %, from the Jacobian at the optimum, "
     "widened for autocorrelated residuals (Ljung, L. (1999), System Identification, 2nd ed.)."),
    ("PI tuning, SIMC",
     "Skogestad, S. (2003), Simple analytic rules for model reduction and PID controller "
     "tuning, J. Process Control 13, 291-309: Kc = tau / (K (tau_c + theta)), "
     "Ti = min(tau, 4 (tau_c + theta))."),
    ("Loop margins",
     "Maximum sensitivity Ms, gain margin and phase margin from the exact frequency response "
     "including e^(-j w theta), not a Padé approximation; Ms limits of 1.2-2.0 are the usual "
     "range (Åström and Hägglund, 1995)."),
)

CAUTIONS: tuple[str, ...] = (
    "Agree every step size, operating limit and test window with operations before testing "
    "or applying tuning.",
    "Stay clear of alarm and trip limits; a step or a new controller must not drive the "
    "process towards them.",
    "Verify any tuning or schedule on the plant, carefully and under supervision, before "
    "relying on it; models from step tests are approximations with the uncertainty shown.",
    "Site procedures, management of change and licensed engineering practice take precedence "
    "over anything in this report.",
)

# ---------------------------------------------------------------- plain labels
#: Model parameters as a person reads them.
PARAMETER_LABELS: dict[str, str] = {
    "gain": "Gain",
    "time_constant": "Time constant",
    "dead_time": "Dead time",
    "gain_over_time_constant": "Gain / time constant",
}

#: Quality grades as written in the report.
QUALITY_LABELS: dict[str, str] = {"good": "good", "suspect": "suspect", "rejected": "rejected",
                                  "": "not judged"}

#: Model names as written in the report.
MODEL_LABELS: dict[str, str] = {
    "fopdt": "first order plus dead time (FOPDT)",
    "integrating": "integrating with dead time",
}

#: The decision as one sentence.
DECISION_TEXT: dict[str, str] = {
    "single": "One controller serves the whole tested range.",
    "schedule": "A gain schedule is needed across the tested range.",
    "insufficient": "Not enough tests to judge: no controller or schedule is handed over.",
}

#: Order and wording of known keys of a verdict's controller, schedule rows and points.
#: A value of None leaves the key out of the report.
SETTING_LABELS: dict[str, str | None] = {
    "level": "Level",
    "level_from": "From level",
    "level_to": "To level",
    "kc": "Controller gain Kc",
    "ti": "Integral time Ti (s)",
    "ti_min": "Integral time Ti (min)",
    "kc_dimensionless": "Controller gain in % of span per % of span",
    "proportional_band": "Proportional band (%)",
    "action": "Controller action",
    "rule": "How it was found",
    "local_rule": "Tuning rule at each level",
    "closed_loop_time": "Closed-loop time constant asked for (s)",
    "serves_whole_range": "Serves the whole tested range",
    "ms": "Maximum sensitivity Ms",
    "gain_margin": "Gain margin",
    "phase_margin_deg": "Phase margin (degrees)",
    "slowdown": "Slower than local tuning by (times)",
    "iae_ratio": "IAE after a load step, times that of local tuning",
    "peak_ratio": "Peak after a load step, times that of local tuning",
    "overshoot": "Overshoot after a setpoint step",
    "kc_local": "Kc tuned at this level",
    "ti_local": "Ti tuned at this level (s)",
    "time_constant": "Time constant (s)",
    "dead_time": "Dead time (s)",
    "gain": "Gain",
    "caution": None,  # shown as the caution box instead
}

#: Words for values that are codes.
VALUE_TEXT: dict[str, str] = {
    "simc": "SIMC (Skogestad 2003)",
    "lambda": "lambda (IMC)",
    "imc": "lambda (IMC)",
    "reverse": "reverse acting",
    "direct": "direct acting",
    "up": "up",
    "down": "down",
    "constant": "constant",
    "linear": "straight",
    "quadratic": "quadratic",
    "log_linear": "straight in log scale",
    "log_quadratic": "curved in log scale",
    "piecewise_linear": "piecewise linear through the level means",
}


def label(key: str) -> str:
    """A plain label for a key: the known wording, else the words of the key."""
    known = SETTING_LABELS.get(key) or PARAMETER_LABELS.get(key)
    if known:
        return known
    words = str(key).replace("_", " ").strip()
    return words[:1].upper() + words[1:]


def value_text(value: object) -> object:
    """Booleans as yes / no, known codes in words; anything else unchanged."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, str):
        known = VALUE_TEXT.get(value) or PARAMETER_LABELS.get(value)
        if known:
            return known
        if re.fullmatch(r"[a-z]+(_[a-z]+)+", value):  # a code this version has no words for
            return value.replace("_", " ")
    return value
