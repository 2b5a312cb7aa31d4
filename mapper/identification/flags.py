"""The one registry of test flags: every flag's name, its sentence and its effect on the grade.

A flag is a short snake_case name for one condition found in a test, raised either when the
file is imported and cut into tests (``source="import"``) or when the test is identified
(``source="identification"``). Each condition has exactly one name. The grade of a test
follows from its flags alone (:func:`grade`): any flag that ``rejects`` makes it
``rejected``; otherwise any flag that makes it ``suspect`` does; flags that only ``inform``
leave it ``good``. The limits behind the flags are rules of thumb of the trade (common
practice), kept in :mod:`mapper.constants`.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

__all__ = [
    "Flag",
    "FLAGS",
    "FLAG_TEXT",
    "REJECTING_FLAGS",
    "REJECTS",
    "SUSPECT",
    "INFORMS",
    "effect",
    "flag_text",
    "grade",
]

REJECTS = "rejects"
SUSPECT = "suspect"
INFORMS = "informs"


@dataclass(frozen=True)
class Flag:
    """One condition a test can show.

    Attributes
    ----------
    name : str
        The flag as stored and printed.
    text : str
        One sentence for a person reading the report.
    effect : str
        ``"rejects"``, ``"suspect"`` or ``"informs"``: what the flag does to the grade.
    source : str
        ``"import"`` (raised while reading and cutting the file), ``"identification"``, or
        ``"map"`` (raised by the operating map when the test disagrees with its neighbours).
    informs_with_start_state : bool
        The flag only informs when the fit estimated the state the plant was in at the
        start of the window (the condition is then part of the model, not a risk to it).
    """

    name: str
    text: str
    effect: str
    source: str = "identification"
    informs_with_start_state: bool = False


_ALL = (
    # --- no usable model --------------------------------------------------------------------
    Flag("too_few_samples", "The record has too few samples to identify a model.", REJECTS),
    Flag("non_finite_samples", "The record holds missing or non-finite samples.", REJECTS),
    Flag("no_input_step", "The input does not move clearly above its noise.", REJECTS),
    Flag("no_baseline_before_step", "There is almost no record before the input step.", REJECTS),
    Flag("step_at_end", "The input step is too close to the end of the record.", REJECTS),
    Flag("no_response", "The output does not change.", REJECTS),
    Flag("response_below_noise", "The output change is not larger than its noise band.", REJECTS),
    Flag("dead_time_beyond_record", "The response starts at or after the end of the record.", REJECTS),
    Flag("fit_failed", "The model fit did not converge to a usable answer.", REJECTS),
    Flag("numerical_failure", "The values are beyond what the fit's arithmetic can carry.", REJECTS),
    Flag(
        "time_constant_not_positive",
        "The method read a zero or negative time constant (the response runs the wrong way "
        "for a first-order model); no model is kept.",
        REJECTS,
    ),
    Flag(
        "response_cut_by_next_move",
        "The next input move came before this move's response could be seen (less than 0.2 "
        "time constants of it after the dead time, judged by the other moves of the same "
        "file); no model is kept.",
        REJECTS,
    ),
    Flag(
        "gain_sign_against_file",
        "The gain's sign is opposite to that of the other moves of the same file, beyond its "
        "interval; a loop's gain keeps its sign over the range, so no model is kept.",
        REJECTS,
    ),
    # --- the test can be used, with care ----------------------------------------------------
    Flag("irregular_sampling", "Samples are not evenly spaced; resample before identification.", SUSPECT),
    Flag(
        "drift_before_step",
        "The output drifted before the step, beyond what the model's starting state explains.",
        SUSPECT,
    ),
    Flag("not_settled", "The record ends before dead time + 4 time constants after the step.", SUSPECT),
    Flag("input_clipped", "The input sat at an instrument limit or was flat-topped.", SUSPECT),
    Flag("output_clipped", "The output sat at an instrument limit or was flat-topped.", SUSPECT),
    Flag(
        "small_response",
        "The output change is small against the noise (signal-to-noise ratio under 5).",
        SUSPECT,
    ),
    Flag("multiple_input_moves", "The input moved more than once during the test.", SUSPECT),
    Flag("few_samples_per_time_constant", "Fewer than 10 samples per time constant.", SUSPECT),
    Flag("quantised_output", "The output is coarsely quantised against its change.", SUSPECT),
    Flag("poor_fit", "The residuals show structure the model does not explain.", SUSPECT),
    Flag(
        "load_change",
        "The output's baseline changed during the test in a way the input does not explain "
        "(a load change or other disturbance); the fitted model is likely biased.",
        SUSPECT,
    ),
    Flag(
        "slow_disturbance",
        "The output wanders slowly by 10 % of the response or more over the record; the "
        "intervals allow for it, but repeat the test when the plant is steadier.",
        SUSPECT,
    ),
    Flag(
        "time_constant_at_bound",
        "The time constant ran to the edge of what the record can show.",
        SUSPECT,
    ),
    # --- what the fit did, for the reader ---------------------------------------------------
    Flag(
        "start_state_estimated",
        "The output was still moving from earlier moves when the test started; the fit "
        "estimated that starting state (a free response with the model's time constant) "
        "together with the parameters.",
        INFORMS,
    ),
    # --- raised at import -------------------------------------------------------------------
    Flag("units_row_skipped", "A row of units under the header was skipped.", INFORMS, "import"),
    Flag(
        "resampled_to_uniform_grid",
        "Samples were put on a uniform grid (input held, output interpolated).",
        INFORMS,
        "import",
    ),
    Flag(
        "compressed_gaps",
        "The record has gaps over five sample periods (stored by exception); the output "
        "inside them is interpolated, not measured.",
        SUSPECT,
        "import",
    ),
    Flag(
        "short_plateau",
        "The input was held only briefly before or after this move.",
        SUSPECT,
        "import",
    ),
    Flag(
        "input_blip",
        "The input moved and came back within a few samples; the blip is one event.",
        SUSPECT,
        "import",
    ),
    Flag(
        "next_move_before_settled",
        "The next input move came before this response settled; the window ends there.",
        SUSPECT,
        "import",
        informs_with_start_state=True,
    ),
    Flag(
        "bad_rows_dropped",
        "Rows with unreadable cells were dropped at import (counted in the import report).",
        SUSPECT,
        "import",
    ),
    # --- raised by the operating map (the test against its neighbours; never stored) ---------
    Flag(
        "outlier_against_trend",
        "The test disagrees with the tests at neighbouring levels beyond its uncertainty (an "
        "outlier against the trend); the map leaves it out.",
        SUSPECT,
        "map",
    ),
    Flag(
        "outlier_against_trend_kept",
        "The test disagrees with the trend beyond its uncertainty, but it is the only test at an "
        "end of the range, where that cannot be told from curvature; the map keeps it.",
        SUSPECT,
        "map",
    ),
)

FLAGS: dict[str, Flag] = {flag.name: flag for flag in _ALL}
FLAG_TEXT: dict[str, str] = {flag.name: flag.text for flag in _ALL}
REJECTING_FLAGS = frozenset(flag.name for flag in _ALL if flag.effect == REJECTS)


def flag_text(name: str) -> str:
    """The sentence for a flag (the name itself for a flag this version does not know)."""
    flag = FLAGS.get(name)
    return flag.text if flag is not None else name


def effect(name: str, *, start_state: bool = False) -> str:
    """What one flag does to the grade; a flag this version does not know makes it suspect."""
    flag = FLAGS.get(name)
    if flag is None:
        return SUSPECT
    if start_state and flag.informs_with_start_state:
        return INFORMS
    return flag.effect


def grade(flags: Iterable[str], *, start_state: bool = False) -> str:
    """``"rejected"`` if any flag rejects, ``"suspect"`` if any makes it suspect, else ``"good"``.

    Parameters
    ----------
    flags : iterable of str
        Import flags and identification flags together.
    start_state : bool, default False
        The fit estimated the state at the start of the window, so flags marked
        ``informs_with_start_state`` only inform.
    """
    effects = {effect(name, start_state=start_state) for name in flags}
    if REJECTS in effects:
        return "rejected"
    return "suspect" if SUSPECT in effects else "good"
