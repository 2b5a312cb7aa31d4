"""Influence of single tests: would the map or the verdict change if one test were left out?

This module owns the leave-one-out checks behind "the verdict would change if test 17 were left
out". For the operating map it refits the trends without each test in turn and reports every test
whose absence would change whether a parameter varies significantly, whether there are enough tests
to judge, or move the map at a tested level outside its own band; tests the map already leaves out as
outliers against the trend are named with what including them would do. For the verdict it reruns
:func:`mapper.analysis.verdict.decide` without each of the most influential tests and reports every
test whose absence changes the decision. Results are frozen records with a ``to_list()`` for JSON
(the ``depends_on`` key).
"""

from __future__ import annotations

import inspect
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from mapper.analysis.opmap import (
    UNITS,
    OperatingMap,
    build_map,
    describe_test,
    excluded_mask,
    format_level,
    usable_tests,
)
from mapper.analysis.trends import LABELS
from mapper.records import plain

__all__ = ["Dependence", "InfluenceReport", "map_influence", "verdict_influence", "with_influence"]

MAP_CANDIDATES = 200  # tests refitted one by one for the map (largest residuals first beyond this)
VERDICT_CANDIDATES = 4  # decisions rerun without one test (most influential on the map first)
# A map value counts as changed when it leaves the map's 95 % band AND moves by more than this share:
# a tenth, half of the +-20 % about the centre that RELEVANT_CHANGE_RATIO (1.4) spans.
VALUE_CHANGE = 0.10


@dataclass(frozen=True)
class Dependence:
    """One test on which a conclusion hangs.

    Attributes
    ----------
    test_id : int or None
    file : str or None
    level : float
    subject : {"map", "verdict"}
    parameter : str or None
        The map parameter concerned (None for the verdict).
    change : str
        ``significance``, ``enough_data``, ``value``, ``outlier`` or ``decision``.
    sentence : str
        What would change, and why, for a person.
    shift : float
        Size of the change in units of the map's 95 % half-band (0 when not a value change).
    """

    test_id: int | None
    file: str | None
    level: float
    subject: str
    parameter: str | None
    change: str
    sentence: str
    shift: float = 0.0

    def to_dict(self) -> dict:
        return plain({"test_id": self.test_id, "file": self.file, "level": self.level, "subject": self.subject,
                      "parameter": self.parameter, "change": self.change, "sentence": self.sentence})


@dataclass(frozen=True)
class InfluenceReport:
    """Whether a conclusion depends on any single test, and on which.

    ``examined`` is the number of tests left out in turn; ``entries`` the dependences found (empty
    when no single test decides the conclusion).
    """

    subject: str
    examined: int
    entries: tuple
    sentence: str

    @property
    def depends(self) -> bool:
        return bool(self.entries)

    def to_list(self) -> list[dict]:
        """The ``depends_on`` JSON value: one dict per dependence."""
        return [entry.to_dict() for entry in self.entries]

    def lines(self) -> list[str]:
        """Sentences for the terminal and the report."""
        return [self.sentence] + [entry.sentence for entry in self.entries]


def _fmt(value) -> str:
    return "n/a" if value is None or not np.isfinite(value) else f"{value:.4g}"


def _row_info(row: dict):
    test_id = row.get("test_id")
    test_id = int(test_id) if test_id is not None and test_id == test_id else None
    file = row.get("file")
    return test_id, (None if file is None or file != file else str(file)), float(row["_x"])


def _compare_maps(base: OperatingMap, other: OperatingMap, row: dict, verb: str) -> list[Dependence]:
    """Differences in conclusions between ``base`` and ``other`` (built without or with ``row``)."""
    test_id, file, level_x = _row_info(row)
    who = describe_test(row)
    found = []
    for name, trend in base.trends.items():
        changed = other.trends.get(name)
        if changed is None:
            continue
        label, unit = LABELS[name], UNITS[name]
        if changed.significant != trend.significant:
            now = "varies significantly" if trend.significant else "shows no significant variation"
            then = "would show none" if trend.significant else "would vary significantly"
            found.append(Dependence(test_id, file, level_x, "map", name, "significance",
                                    f"The {label} {now} over the tested range, but {then} if {who} were {verb}.",
                                    ))
        elif changed.enough_data != trend.enough_data:
            then = "there would not be enough tests to judge it" if trend.enough_data else "it could be judged"
            found.append(Dependence(test_id, file, level_x, "map", name, "enough_data",
                                    f"For the {label}, {then} if {who} were {verb}."))
        worst = None
        for level in base.levels:
            if not other.level_min <= level <= other.level_max:
                continue
            value, lo, hi = trend.evaluate(level)
            moved = changed.evaluate(level)[0]
            half = max(hi - value, value - lo)
            if not np.isfinite(half) or half <= 0:
                continue
            shift = abs(moved - value) / half
            relative = abs(moved - value) / abs(value) if value != 0 else np.inf
            if shift > 1.0 and relative > VALUE_CHANGE and (worst is None or shift > worst[0]):
                worst = (shift, level, value, moved)
        if worst is not None:
            shift, level, value, moved = worst
            found.append(Dependence(
                test_id, file, level_x, "map", name, "value",
                f"If {who} were {verb}, the {label} at {base.against} {format_level(level)} would be "
                f"{_fmt(moved)}{unit} instead of {_fmt(value)}{unit} ({(moved - value) / abs(value):+.0%}), outside "
                f"the map's 95 % band ({shift:.1f} times its half-width).", shift))
    return found


def map_influence(params: pd.DataFrame, *, against: str = "level", opmap: OperatingMap | None = None
                  ) -> InfluenceReport:
    """Does the operating map depend on any single test?

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of ``test_params`` (rejected and excluded tests are left out as by the map).
    against : str
        Level column.
    opmap : OperatingMap, optional
        The map already built from ``params``.

    Returns
    -------
    InfluenceReport

    Notes
    -----
    Case deletion (Cook & Weisberg, *Residuals and Influence in Regression*, 1982): the trends are
    refitted without each test in turn, with the outliers of the full map held out, and a test is
    reported when its absence flips the significance of a parameter's variation or the sufficiency
    of the data, or moves the map at a tested level beyond the map's own 95 % band and by more than
    ``VALUE_CHANGE`` (10 %). Each
    outlier the map leaves out is reported with what the map would say with it. Beyond
    ``MAP_CANDIDATES`` tests only those farthest from the map in their own standard deviations are
    refitted.
    """
    base = opmap or build_map(params, against=against)
    frame = usable_tests(params, against)
    frame = frame[frame["model"] == base.model].reset_index(drop=True)
    rows = frame.to_dict("records")
    left_out_ids = {o["test_id"] for o in base.outliers if o["left_out"]}
    ids = frame["test_id"].tolist() if "test_id" in frame.columns else list(range(len(frame)))
    is_outlier = np.array([i in left_out_ids for i in ids], dtype=bool)
    inliers = frame[~is_outlier]
    entries: list[Dependence] = []
    robust_base = build_map(inliers, against=against, robust=False) if is_outlier.any() else base
    for position in np.flatnonzero(is_outlier):
        with_it = build_map(pd.concat([inliers, frame.iloc[[int(position)]]]), against=against, robust=False)
        reasons = [o["sentence"] for o in base.outliers if o["test_id"] == ids[position] and o["left_out"]]
        test_id, file, level_x = _row_info(rows[position])
        entries.append(Dependence(test_id, file, level_x, "map", None, "outlier",
                                  (reasons[0][0].upper() + reasons[0][1:] + ".") if reasons else
                                  f"{describe_test(rows[position])} is left out as an outlier against the trend."))
        entries += _compare_maps(robust_base, with_it, rows[position], "included")
    candidates = np.flatnonzero(~is_outlier)
    if candidates.size > MAP_CANDIDATES:
        candidates = candidates[np.argsort(-_distance(robust_base, frame.iloc[candidates]))[:MAP_CANDIDATES]]
    examined = 0
    for position in candidates:
        rest = inliers.drop(index=frame.index[int(position)])
        if rest.empty:
            continue
        try:
            without = build_map(rest, against=against, robust=False)
        except Exception:  # noqa: BLE001 - a map that cannot be built without one test depends on it
            test_id, file, level_x = _row_info(rows[position])
            entries.append(Dependence(test_id, file, level_x, "map", None, "value",
                                      f"Without {describe_test(rows[position])} no map could be built."))
            continue
        examined += 1
        entries += _compare_maps(robust_base, without, rows[position], "left out")
    if entries:
        named = sorted({e.test_id for e in entries if e.test_id is not None})
        sentence = (f"The map depends on single tests: {', '.join(f'test {i}' for i in named)} "
                    f"(leaving out each of {examined} tests in turn).")
    else:
        sentence = (f"No single test decides the map: leaving out any one of the {examined} tests moves no "
                    f"trend beyond its band by more than {VALUE_CHANGE:.0%} and changes no significance or "
                    f"sufficiency of the data.")
    return InfluenceReport("map", examined, tuple(entries), sentence)


def _distance(opmap: OperatingMap, frame: pd.DataFrame) -> np.ndarray:
    """Largest distance of each test from the map, in the test's own standard deviations."""
    from mapper.analysis.opmap import parameter_values
    worst = np.zeros(len(frame))
    x = frame["_x"].to_numpy(float)
    for name, trend in opmap.trends.items():
        value, sigma = parameter_values(frame, name)
        expected = trend.evaluate(x)[0]
        with np.errstate(divide="ignore", invalid="ignore"):
            distance = np.abs(value - expected) / sigma
        worst = np.fmax(worst, np.nan_to_num(distance, nan=0.0, posinf=1e300))
    return worst


def with_influence(opmap: OperatingMap, params: pd.DataFrame) -> OperatingMap:
    """The map with its ``depends_on`` entries filled (see :func:`map_influence`)."""
    report = map_influence(params, against=opmap.against, opmap=opmap)
    return replace(opmap, depends_on=report.entries, influence_sentence=report.sentence)


def verdict_influence(params: pd.DataFrame, *, decision: str | None = None, opmap: OperatingMap | None = None,
                      candidates: int = VERDICT_CANDIDATES, **decide_options) -> InfluenceReport:
    """Does the verdict depend on any single test?

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of ``test_params``.
    decision : str, optional
        The decision with every test (computed when not given).
    opmap : OperatingMap, optional
        The map built from ``params`` (used to rank the tests).
    candidates : int
        How many tests to leave out in turn (default 4): outliers against the trend and tests the map
        depends on first, then the tests farthest from the map in their own standard deviations.
    **decide_options
        Passed to :func:`mapper.analysis.verdict.decide` (limits, rule, ranges, against).

    Returns
    -------
    InfluenceReport

    Notes
    -----
    Case deletion (Cook & Weisberg, 1982) on the decision itself: each candidate test is left out and
    the verdict decided again; every test whose absence changes the decision is reported. Tests are
    ranked by how far their absence moves the map (in units of its band) so that the reruns, which
    are costly, go to the tests that can matter.
    """
    from mapper.analysis.verdict import decide
    against = decide_options.get("against", "level")
    base_map = opmap or build_map(params, against=against)
    if decision is None:
        decision = decide(params, **decide_options).decision
    # A map from with_influence already carries its dependences; otherwise find them.
    known = base_map.depends_on if base_map.influence_sentence else None
    map_entries = known if known is not None else map_influence(params, against=against, opmap=base_map).entries
    score: dict = {}
    for entry in map_entries:
        bonus = 1e6 if entry.change in ("outlier", "significance", "enough_data") else 0.0
        score[entry.test_id] = max(score.get(entry.test_id, 0.0), entry.shift + bonus)
    frame = usable_tests(params, against)
    frame = frame[frame["model"] == base_map.model]
    ids = [int(i) for i in frame["test_id"]] if "test_id" in frame.columns else []
    distance = dict(zip(ids, _distance(base_map, frame)))
    order = sorted(ids, key=lambda i: (-score.get(i, 0.0), -distance.get(i, 0.0)))[:max(int(candidates), 0)]
    accepts_map = "opmap" in inspect.signature(decide).parameters
    entries = []
    keep = ~excluded_mask(params)
    outliers = {o["test_id"] for o in base_map.outliers if o["left_out"]}
    inliers = params[keep & ~params["test_id"].isin(outliers).to_numpy()]
    for test_id in order:
        row = frame[frame["test_id"] == test_id].iloc[0].to_dict()
        options = dict(decide_options)
        try:
            if test_id in outliers:
                # Already left out of the map: what would the verdict be with it counted?
                if not accepts_map:
                    continue
                counted = pd.concat([inliers, params[params["test_id"] == test_id]])
                options["opmap"] = build_map(counted, against=against, robust=False)
                other, verb = decide(counted, **options).decision, "counted"
            else:
                rest = params[keep & (params["test_id"] != test_id).to_numpy()]
                if accepts_map:
                    # The full map's outliers stay out; no new outlier search per rerun.
                    options["opmap"] = build_map(inliers[inliers["test_id"] != test_id], against=against,
                                                 robust=False)
                other, verb = decide(rest, **options).decision, "left out"
        except Exception as error:  # noqa: BLE001 - no verdict without the test: it decides the verdict
            other, verb = f"no verdict ({error})", "left out"
        if other != decision:
            test, file, level_x = _row_info(row)
            why = (" It is an outlier against the trend, which the map leaves out; the decision rests on "
                   "leaving it out." if test_id in outliers else "")
            entries.append(Dependence(test, file, level_x, "verdict", None, "decision",
                                      f"The verdict would change from {decision} to {other} if "
                                      f"{describe_test(row)} were {verb}.{why}"))
    if entries:
        sentence = (f"The verdict ({decision}) depends on single tests: "
                    + ", ".join(f"test {e.test_id}" for e in entries) + ".")
    else:
        sentence = (f"No single test decides the verdict ({decision}): leaving out each of the {len(order)} "
                    f"tests that move the map most gives the same decision.")
    return InfluenceReport("verdict", len(order), tuple(entries), sentence)
