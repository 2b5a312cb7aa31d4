"""Thresholds and constants shared across layers, each with its source.

One home per rule: a limit used in more than one module lives here, named for what it
limits. Rules of thumb of the trade are marked "common practice"; they are constants so a
site can see and argue with them.
"""

from __future__ import annotations

__all__ = [
    "Z95",
    "MIN_FILE_SAMPLES",
    "MIN_FIT_SAMPLES",
    "MIN_BASELINE_SAMPLES",
    "MIN_AFTER_STEP_SAMPLES",
    "MIN_RESPONSE_SAMPLES",
    "SETTLE_TIME_CONSTANTS",
    "MIN_RESPONSE_SIGNAL_TO_NOISE",
    "NOISE_BAND_SDS",
    "MIN_SAMPLES_PER_TIME_CONSTANT",
    "DRIFT_FRACTION",
    "MOVE_FRACTION",
    "MOVE_NOISE_SDS",
    "MOVE_SPAN_FRACTION",
    "RAMP_GAP_SAMPLES",
    "BLIP_SAMPLES",
    "SHORT_PLATEAU_SAMPLES",
    "QUANTUM_LEVELS",
    "CLIP_SPAN_FRACTION",
    "MISFIT_FRACTION",
    "RELEVANT_CHANGE_RATIO",
]

# two-sided 95 % point of the standard normal (any statistics table; scipy.stats.norm.ppf(0.975))
Z95 = 1.959963984540054

# --- sample counts ------------------------------------------------------------------------
MIN_FILE_SAMPLES = 20  # a data file or test window shorter than this cannot hold a step test
MIN_FIT_SAMPLES = 10  # fewer samples than this in a window: no model is identified
MIN_BASELINE_SAMPLES = 3  # samples before the step needed to know where the output started
MIN_AFTER_STEP_SAMPLES = 5  # samples after the step needed to see a response at all
MIN_RESPONSE_SAMPLES = 3  # the fitted response must start at least this many samples before the end

# --- rules of thumb for judging a test (common practice) ------------------------------------
SETTLE_TIME_CONSTANTS = 4.0  # 98 % of the change is reached after dead time + 4 tau
# signal-to-noise ratio (output change / residual sd) under which a response is small: the
# documented threshold of about 4-5 (common practice); at 4 (one noise band) it is rejected
MIN_RESPONSE_SIGNAL_TO_NOISE = 5.0
NOISE_BAND_SDS = 4.0  # peak-to-peak noise band taken as +-2 sd
MIN_SAMPLES_PER_TIME_CONSTANT = 10.0
DRIFT_FRACTION = 0.10  # pre-step drift, carried over the test, against the response
MOVE_FRACTION = 0.10  # input moves smaller than this share of the main step are ignored

# --- finding input moves in a record (common practice) ------------------------------------
MOVE_NOISE_SDS = 8.0  # a move changes the held input by more than this many noise sds...
MOVE_SPAN_FRACTION = 0.02  # ...and by more than this share of the input's range
RAMP_GAP_SAMPLES = 2  # ramp pieces one way with at most this many samples between: one move
BLIP_SAMPLES = 5  # a move reversed within this many samples is one event (a blip)
SHORT_PLATEAU_SAMPLES = MIN_FILE_SAMPLES  # input held for fewer samples before or after a move
QUANTUM_LEVELS = 50  # fewer output levels than this across the response: quantised
CLIP_SPAN_FRACTION = 0.005  # within 0.5 % of an instrument limit counts as at the limit
MISFIT_FRACTION = 0.10  # systematic residual beyond 10 % of the response: poor fit

# --- operating map ----------------------------------------------------------------------------
# Smallest change of a parameter over the tested range that matters for one controller: a loop tuned
# by SIMC with tau_c = theta, L = e^(-theta s)/(2 theta s), has Ms 1.59 (Skogestad 2003); its loop gain
# times 1.4 gives Ms 2.0, the default limit (computed from that loop). The map says "not enough tests"
# rather than "constant" while a change of this factor is still inside the uncertainty.
RELEVANT_CHANGE_RATIO = 1.4
