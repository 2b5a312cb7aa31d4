"""Enough tests to judge? The verdict's check for too few tests or levels, with what to add.

A verdict of "one controller serves" or "a schedule is needed" rests on seeing how the process moves
across the range. Two tested levels show a difference but not its shape (a straight line always fits
two points, so nothing between or beyond them is checked), and tests without a single repeat give no
way to tell whether the tests agree within their stated uncertainty. This module says when that is
the case and names the levels that would settle it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from mapper.analysis.opmap import format_level
from mapper.analysis.trends import cluster_levels

__all__ = ["MIN_LEVELS", "Shortfall", "check_sufficiency"]

MIN_LEVELS = 3  # a trend's shape needs a third level beyond the two a straight line always fits (common practice)


@dataclass(frozen=True)
class Shortfall:
    """Why the tests are not enough, and what to add.

    Attributes
    ----------
    levels : tuple of float
        Tested levels (cluster means).
    tests : int
        Usable tests.
    levels_to_add : tuple of float
        New levels to test.
    repeat_at : tuple of float
        Tested levels where a repeat test would help.
    sentence : str
    """

    levels: tuple
    tests: int
    levels_to_add: tuple
    repeat_at: tuple
    sentence: str

    def numbers(self) -> dict:
        """The figures of the ``insufficient_data`` reason."""
        return {"levels": list(self.levels), "tests": self.tests, "min_levels": MIN_LEVELS,
                "levels_to_add": list(self.levels_to_add), "repeat_at": list(self.repeat_at)}


def _new_levels(levels, output_range) -> list[float]:
    if len(levels) >= 2:
        gaps = np.diff(levels)
        widest = int(np.argmax(gaps))
        return [float(levels[widest] + 0.5 * gaps[widest])]
    if output_range is None:
        return []
    low, high = sorted(float(v) for v in output_range)
    span = high - low
    level = levels[0]
    below = [low + f * span for f in (0.25, 0.1) if low + f * span < level - 0.1 * span]
    above = [low + f * span for f in (0.75, 0.9) if low + f * span > level + 0.1 * span]
    return [round(v, 6) for v in below[:1] + above[:1]]


def check_sufficiency(used: pd.DataFrame, *, against: str = "level", output_range=None,
                      loop_gain_trend=None) -> Shortfall | None:
    """None when the tests can support a verdict, else a :class:`Shortfall` naming what to add.

    Parameters
    ----------
    used : pandas.DataFrame
        Usable tests (not rejected, not excluded) with a numeric ``against`` column.
    against : str
        Level column.
    output_range : pair of float, optional
        Instrument range of the output, used to suggest levels when only one was tested.
    loop_gain_trend : Trend, optional
        The map's trend of the parameter that sets the controller (K/tau for a lag-dominant loop, K
        otherwise). When the map says its tests cannot rule out a change that matters
        (``enough_data`` False), the verdict cannot either.

    Notes
    -----
    Enough means at least three distinct levels (levels within 2 % of the tested span count as one),
    at least one level tested twice, and a loop-gain trend that is either significant or tight enough
    to rule out a change of the size that matters (the map's ``RELEVANT_CHANGE_RATIO``).
    """
    x = pd.to_numeric(used[against], errors="coerce").to_numpy(float)
    x = x[np.isfinite(x)]
    labels = cluster_levels(x)
    levels = [float(np.mean(x[labels == k])) for k in range(labels.max() + 1)] if x.size else []
    counts = [int(np.sum(labels == k)) for k in range(len(levels))]
    repeated = any(c >= 2 for c in counts)
    loose = loop_gain_trend is not None and not getattr(loop_gain_trend, "enough_data", True)
    if len(levels) >= MIN_LEVELS and repeated and not loose:
        return None
    add = _new_levels(levels, output_range) if len(levels) < MIN_LEVELS else []
    if loose and len(levels) >= MIN_LEVELS:
        add = [float(v) for v in loop_gain_trend.levels_to_add]
    repeat_at = [] if repeated else ([lv for lv in levels] if len(levels) < MIN_LEVELS else [levels[len(levels) // 2]])
    parts = []
    if loose and len(levels) >= MIN_LEVELS:
        ratio = loop_gain_trend.detectable_ratio
        parts.append(f"narrow the {loop_gain_trend.parameter.replace('_', ' ')} (its tests still allow a change "
                     f"by a factor of {ratio:.2g} across the range) with tests at {against} "
                     + ", ".join(format_level(v) for v in add))
    if len(levels) < MIN_LEVELS:
        missing = MIN_LEVELS - len(levels)
        where = (f" (for example at {against} {', '.join(format_level(v) for v in add)})" if add else
                 ", one below and one above the level tested" if len(levels) == 1 else "")
        parts.append(f"test at least {missing} more level{'s' if missing > 1 else ''}{where}")
    if repeat_at:
        parts.append(f"repeat a test at {against} {', '.join(format_level(v) for v in repeat_at)}")
    tested = ", ".join(format_level(v) for v in levels)
    sentence = (f"Not enough tests to judge: {len(x)} test{'s' if len(x) != 1 else ''} at {len(levels)} "
                f"level{'s' if len(levels) != 1 else ''} ({against} {tested}); a verdict needs at least "
                f"{MIN_LEVELS} levels, one repeat and tests tight enough to show how the process moves across the "
                f"range. To settle "
                f"it, {' and '.join(parts)}. The figures below are for the tested levels only; no controller "
                f"or schedule is handed over.")
    return Shortfall(levels=tuple(levels), tests=int(len(x)), levels_to_add=tuple(add),
                     repeat_at=tuple(repeat_at), sentence=sentence)
