"""Fixed texts of the report: the methods with their published sources and the safety cautions."""

from __future__ import annotations

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
