"""Verdict: does one PI controller serve the whole tested range, or is a gain schedule needed?

This module owns the decision, the reasons a person can defend (each with a stable code and the
numbers it refers to), and the schedule table. The test is robustness and time-domain performance,
not a ratio rule: one controller is searched over every tested operating point, and it is enough when
at every point the maximum sensitivity Ms stays at or under a limit and the integrated absolute error
after a load step at the plant input is at most a set factor above that of a controller tuned at that
point (:mod:`mapper.analysis.controller_search`). Too few tests or levels give ``insufficient``.

Operating points are the tested levels; the process there is taken from the operating-map trends,
and a parameter whose variation is not significant is held at its constant fit (variation inside the
uncertainty is not variation).
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from mapper.analysis.controller_search import CandidateTable, make_points, measure, search, serves
from mapper.analysis.opmap import OperatingMap, build_map, excluded_mask, format_level, format_limit, usable_tests
from mapper.analysis.responses import response_rows
from mapper.analysis.sufficiency import check_sufficiency
from mapper.analysis.tuning import dimensionless_gain, tune
from mapper.errors import DataError
from mapper.records import plain

CAUTION = ("CAUTION: new tuning on a live plant can hurt people and equipment. Agree limits with "
           "operations, stay clear of alarm and trip limits, verify before use (in manual, with the "
           "loop watched), and defer to site procedures and licensed practice.")
INTERPOLATION_NOTE = ("Between rows, interpolate kc and ti linearly in level between the row levels; "
                      "outside the first and last row hold their values. Two rows with equal settings "
                      "bound a band where the controller is held.")
LAG_DOMINANT_RATIO = 4.0  # time constant / dead time above which a loop counts as lag-dominant (common practice)
FIGURES = ("ms", "slowdown", "iae_ratio", "peak_ratio", "overshoot")


@dataclass(frozen=True)
class Verdict:
    """Outcome of :func:`decide`.

    Attributes
    ----------
    decision : {"single", "schedule", "insufficient"}
    reasons : tuple of str
        Sentences with numbers.
    reason_codes : tuple of str
        Stable code of each sentence, in the same order (``reason_codes[i]`` belongs to ``reasons[i]``).
    reason_details : tuple of dict
        ``{"code": ..., <numbers the sentence refers to>}``, in the same order.
    variation : dict
        ``{parameter: {"min", "max", "ratio", "significant"}}`` over the tested range.
    controller : dict
        The best single controller found (``serves_whole_range`` says whether it is enough).
    points : tuple of dict
        That controller at every tested level: ``level, ms, gain_margin, phase_margin_deg, slowdown,
        iae_ratio, peak_ratio, overshoot`` plus the process and local tuning there.
    schedule : tuple of dict
        Rows of the schedule table (interpolation nodes; empty when the decision is ``insufficient``).
    schedule_points : tuple of dict
        The schedule as the table tells the user to apply it, at every tested level.
    depends_on : tuple
        Single tests the decision hangs on (:class:`mapper.analysis.influence.Dependence`), filled by
        :func:`mapper.analysis.influence.verdict_influence` via the app; ``depends_on_sentence`` says
        what was checked.
    """

    decision: str
    reasons: tuple
    variation: dict
    controller: dict
    points: tuple
    schedule: tuple
    ms_max: float
    slowdown_max: float
    against: str = "level"
    notes: tuple = field(default=())
    reason_codes: tuple = field(default=())
    reason_details: tuple = field(default=())
    schedule_points: tuple = field(default=())
    campaign: str | None = None
    depends_on: tuple = field(default=())
    depends_on_sentence: str = ""

    def to_dict(self) -> dict:
        """The JSON shape of ``mapper verdict --format json`` (non-finite numbers become None)."""
        return plain({"campaign": self.campaign, "decision": self.decision, "reasons": list(self.reasons),
                      "reason_codes": list(self.reason_codes), "reason_details": list(self.reason_details),
                      "variation": self.variation, "controller": self.controller,
                      "points": list(self.points), "schedule": list(self.schedule),
                      "schedule_points": list(self.schedule_points),
                      "ms_max": self.ms_max, "slowdown_max": self.slowdown_max,
                      "depends_on": [entry.to_dict() for entry in self.depends_on]})

    def report_dict(self) -> dict:
        """:meth:`to_dict` plus ``responses``: simulated closed-loop curves for the report's chart."""
        out = self.to_dict()
        out["responses"] = response_rows(out)
        return out

    def level_rows(self, *, schedule: bool = False) -> list[dict]:
        """Per tested level: Ms, margins, IAE ratio, peak ratio and overshoot, for printing.

        ``schedule=True`` gives the schedule as applied (interpolated) instead of the single controller.
        """
        rows = self.schedule_points if schedule else self.points
        keys = ("level", "kc", "ti", "ms", "gain_margin", "phase_margin_deg", "iae_ratio", "peak_ratio", "overshoot")
        return [{k: row.get(k) for k in keys} for row in rows]

    def write_schedule_csv(self, path, units: dict | None = None) -> None:
        """Write the schedule table as CSV, with ``#`` header lines for units and the safety caution.

        Parameters
        ----------
        path : str or path-like
        units : dict, optional
            ``{"input": ..., "output": ...}`` unit names (as in the campaign file's ``[units]``).
        """
        units = units or {}
        unit_in, unit_out = units.get("input", "input units"), units.get("output", "output units")
        columns = ["level", "level_from", "level_to", "band", "kc", "ti", "ti_min"]
        if any("proportional_band" in row for row in self.schedule):
            columns += ["kc_dimensionless", "proportional_band"]
        columns += list(FIGURES)
        with open(path, "w", newline="", encoding="utf-8") as handle:
            handle.write(f"# mapper PI schedule; decision: {self.decision}\n")
            handle.write(f"# units: {self.against} in {unit_out}; kc in {unit_in} per {unit_out}; ti in s; "
                         f"ti_min in min; kc_dimensionless in %/%; proportional_band in %\n")
            handle.write(f"# limits: Ms <= {format_limit(self.ms_max)}; slowdown <= {format_limit(self.slowdown_max)} "
                         f"(integrated absolute error after a load step at the plant input, against a "
                         f"controller tuned at each level)\n")
            handle.write(f"# {INTERPOLATION_NOTE}\n")
            handle.write(f"# {CAUTION}\n")
            writer = csv.DictWriter(handle, fieldnames=columns, extrasaction="ignore")
            writer.writeheader()
            for row in self.schedule:
                writer.writerow({k: _round(row.get(k)) for k in columns})


def _round(value):
    if isinstance(value, float):
        return "" if not math.isfinite(value) else f"{value:.6g}"
    return "" if value is None else value


def _ranges(ranges):
    if ranges is None:
        return None, None
    if isinstance(ranges, dict):
        return ranges.get("input"), ranges.get("output")
    input_range, output_range = ranges
    return input_range, output_range


class _Reasons:
    """Sentences with their stable codes and numbers, kept in step."""

    def __init__(self):
        self.texts, self.codes, self.details = [], [], []

    def add(self, code: str, text: str, **numbers) -> None:
        self.texts.append(text)
        self.codes.append(code)
        self.details.append({"code": code, **numbers})


def _processes(opmap: OperatingMap, rule: str, closed_loop_time):
    notes, processes, locals_ = [], [], []
    for level in opmap.levels:
        gain = opmap.value("gain", level, significant_only=True)[0]
        tau = opmap.value("time_constant", level, significant_only=True)[0] if opmap.model == "fopdt" else None
        theta = max(opmap.value("dead_time", level, significant_only=True)[0], 0.0)
        if tau is not None and not tau > 0:
            trend = opmap.trend("time_constant")
            if trend is None:
                raise DataError(f"no time-constant trend at {opmap.against} {format_level(level)}")
            tau = trend.constant
            notes.append(f"time-constant trend not positive at {opmap.against} {format_level(level)}: "
                         f"its mean {tau:.4g} s used there")
        tau_c = closed_loop_time
        if tau_c is None and theta <= 1e-9 * (tau or 1.0):
            hi = opmap.value("dead_time", level)[2]
            tau_c = hi if hi > 0 else (0.1 * tau if tau else None)
            if tau_c is None:
                raise DataError(f"dead time is zero at {opmap.against} {format_level(level)}; "
                                "no closed-loop time to aim at",
                                hint="give closed_loop_time (desired closed-loop time constant, s)")
            notes.append(f"dead time near zero at {opmap.against} {format_level(level)}: "
                         f"closed-loop time set to {tau_c:.3g} s")
        local = tune(rule, gain, tau, theta, closed_loop_time=tau_c, model=opmap.model)
        processes.append((level, gain, tau, theta, opmap.model))
        locals_.append(local)
    return processes, locals_, notes


def _bands(points, table, ms_max, slowdown_max):
    """Greedy merge of neighbouring points while one lattice controller serves them all."""
    bands, start = [], 0
    while start < len(points):
        end = start + 1
        while (end < len(points)
               and table.best(list(range(start, end + 1)), ms_max * 0.999, slowdown_max * 0.999)[1] <= 1.0):
            end += 1
        controller, _ = search(points, ms_max, slowdown_max, table=table, columns=range(start, end))
        bands.append((start, end, controller))
        start = end
    return bands


def _schedule(bands, points, input_range, output_range, level_min, level_max, applied=None):
    """Schedule rows (interpolation nodes) and the schedule as applied at every tested level.

    Each band holds its controller between its first and last tested level (two rows with equal
    settings); between bands the settings are interpolated. The outer ends need one row only.
    """
    nodes = []
    for i, (start, end, controller) in enumerate(bands):
        low = level_min if i == 0 else 0.5 * (points[start - 1].level + points[start].level)
        high = level_max if end == len(points) else 0.5 * (points[end - 1].level + points[end].level)
        ends = [start, end - 1]
        if len(bands) == 1:
            ends = [None]
        elif i == 0:
            ends = [end - 1]
        elif i == len(bands) - 1:
            ends = [start]
        for j in dict.fromkeys(ends):
            level = float(np.mean([p.level for p in points[start:end]])) if j is None else points[j].level
            nodes.append({"level": level, "level_from": low, "level_to": high, "band": i + 1,
                          "kc": controller.kc, "ti": controller.ti, "ti_min": controller.ti_min,
                          "tested_levels": [p.level for p in points[start:end]]})
    node_levels = [n["level"] for n in nodes]
    kc = np.interp([p.level for p in points], node_levels, [n["kc"] for n in nodes])
    ti = np.interp([p.level for p in points], node_levels, [n["ti"] for n in nodes])
    if applied is None:
        applied = measure(kc, ti, points)
    for row in nodes:
        covered = [r for r in applied if row["level_from"] - 1e-12 <= r["level"] <= row["level_to"] + 1e-12]
        row.update({k: max(r[k] for r in covered) for k in FIGURES})
        dimensionless = dimensionless_gain(row["kc"], input_range=input_range, output_range=output_range)
        if dimensionless is not None:
            row["kc_dimensionless"] = dimensionless
            row["proportional_band"] = 100.0 / abs(dimensionless)
    return nodes, applied


def _variation_reasons(reasons: _Reasons, opmap: OperatingMap, summary: dict, points, decision: str) -> None:
    for name, row in summary.items():
        if row["significant"]:
            reasons.add("parameter_varies", row["reason"][:1].upper() + row["reason"][1:] + ".", parameter=name,
                        min=row["min"], max=row["max"], ratio=row["ratio"], p_value=row.get("p_value"))
    sig = {name: row["significant"] for name, row in summary.items()}
    if not any(sig.values()):
        reasons.add("no_significant_variation", "No parameter varies beyond its uncertainty over the tested range.")
    gain = summary.get("gain") or {}
    lag_dominant = opmap.model == "fopdt" and all(
        p.time_constant >= LAG_DOMINANT_RATIO * p.dead_time for p in points)
    if (lag_dominant and sig.get("gain") and sig.get("time_constant")
            and not sig.get("gain_over_time_constant")):
        reasons.add(
            "kt_constant",
            f"Gain (ratio {gain['ratio']:.2f}) and time constant (ratio {summary['time_constant']['ratio']:.2f}) "
            f"move together while gain / time constant stays within its uncertainty; the loop is lag-dominant "
            f"(time constant at least {LAG_DOMINANT_RATIO:g} times the dead time at every level), where K/tau, "
            f"not K, sets the controller, so a gain-ratio rule would overstate the need for a schedule.",
            gain_ratio=gain["ratio"], time_constant_ratio=summary["time_constant"]["ratio"],
            lag_dominant_ratio=LAG_DOMINANT_RATIO)
    dynamics = ("time_constant", "dead_time") if opmap.model == "fopdt" else ("dead_time",)
    if decision == "schedule" and sig.get("gain") and not any(sig.get(d) for d in dynamics):
        reasons.add(
            "characterise_input",
            f"Only the gain moves (from {gain['min']:.4g} to {gain['max']:.4g}, ratio {gain['ratio']:.2f}); "
            f"the dynamics (time constant, dead time) stay within their uncertainty. Characterising the input "
            f"- a linearising curve on the valve/actuator output, the inverse of the gain curve - would serve "
            f"instead of a schedule, leaving one controller.",
            gain_min=gain["min"], gain_max=gain["max"], gain_ratio=gain["ratio"])


def _performance_reasons(reasons: _Reasons, rows, controller, single, span, against, ms_max, slowdown_max):
    worst_ms = max(rows, key=lambda r: r["ms"])
    worst_slow = max(rows, key=lambda r: r["iae_ratio"])
    if single:
        reasons.add(
            "single_controller_serves",
            f"One PI controller (kc {controller.kc:.4g}, ti {controller.ti:.4g} s) serves every tested level "
            f"({span}, {len(rows)} level{'s' if len(rows) > 1 else ''}): Ms at most {worst_ms['ms']:.2f} (limit "
            f"{format_limit(ms_max)}, at {against} {format_level(worst_ms['level'])}) and integrated absolute "
            f"error after a load step at most {worst_slow['iae_ratio']:.2f} times that of a locally tuned "
            f"controller (limit {format_limit(slowdown_max)}, at {against} {format_level(worst_slow['level'])}).",
            kc=controller.kc, ti=controller.ti, ms=worst_ms["ms"], ms_level=worst_ms["level"],
            iae_ratio=worst_slow["iae_ratio"], iae_level=worst_slow["level"], ms_max=ms_max,
            slowdown_max=slowdown_max)
        return
    reasons.add("no_single_controller",
                f"No single PI controller keeps Ms <= {format_limit(ms_max)} and slowdown <= "
                f"{format_limit(slowdown_max)} at every tested level ({span}); the best one found (kc "
                f"{controller.kc:.4g}, ti {controller.ti:.4g} s) fails as follows.",
                kc=controller.kc, ti=controller.ti, ms_max=ms_max, slowdown_max=slowdown_max)
    over_ms = [r for r in rows if r["ms"] > ms_max * (1 + 1e-6)]
    over_slow = [r for r in rows if r["iae_ratio"] > slowdown_max * (1 + 1e-6)]
    if over_ms:
        reasons.add("ms_over_limit",
                    f"At {against} {format_level(worst_ms['level'])} the single controller reaches Ms "
                    f"{worst_ms['ms']:.2f} (limit {format_limit(ms_max)}); Ms is over the limit at {len(over_ms)} "
                    f"of {len(rows)} tested levels.",
                    level=worst_ms["level"], ms=worst_ms["ms"], limit=ms_max, levels_over=len(over_ms),
                    levels=len(rows))
    if over_slow:
        reasons.add("too_slow",
                    f"At {against} {format_level(worst_slow['level'])} the single controller leaves "
                    f"{worst_slow['iae_ratio']:.2f} times the integrated absolute error of one tuned there after a "
                    f"load step (limit {format_limit(slowdown_max)}; peak deviation {worst_slow['peak_ratio']:.2f} "
                    f"times); too slow at {len(over_slow)} of {len(rows)} tested levels.",
                    level=worst_slow["level"], iae_ratio=worst_slow["iae_ratio"],
                    peak_ratio=worst_slow["peak_ratio"], limit=slowdown_max, levels_over=len(over_slow),
                    levels=len(rows))


def decide(params: pd.DataFrame, *, ms_max: float = 2.0, slowdown_max: float = 2.0,
           closed_loop_time: float | None = None, ranges=None, rule: str = "simc", against: str = "level",
           opmap: OperatingMap | None = None) -> Verdict:
    """Decide whether one PI controller serves every tested operating point or a schedule is needed.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the store view ``test_params`` (rejected and excluded tests are left out).
    ms_max : float
        Largest acceptable maximum sensitivity (default 2.0; Åström & Hägglund give 1.2-2.0).
    slowdown_max : float
        Largest acceptable ratio of integrated absolute errors after a load step at the plant input,
        single controller against a locally tuned one (default 2).
    closed_loop_time : float, optional
        Closed-loop time constant (tau_c, s) for the local tunings; default the local dead time.
    ranges : dict or pair, optional
        Instrument ranges ``{"input": [lo, hi], "output": [lo, hi]}`` for proportional bands.
    rule : {"simc", "lambda"}
        Rule for the local tunings.
    against : str
        Level column for the map.
    opmap : OperatingMap, optional
        A map already built from ``params`` (excluded tests left out, as :func:`build_map` does).

    Returns
    -------
    Verdict

    Raises
    ------
    DataError
        For limits that make no sense or when no usable test is left.

    Notes
    -----
    At each tested level the process comes from the map trends (constant fits for parameters whose
    variation is not significant) and is tuned locally with SIMC (Skogestad, 2003) or lambda tuning.
    Performance is the integrated absolute error (IAE) after a unit load step at the plant input,
    simulated with the exact dead time, relative to the local tuning: Skogestad (2003) judges PI
    tunings by IAE against a load disturbance, and the integrated error ``ti / kc`` alone rewards
    oscillation. Robustness is Ms from the exact frequency response (Åström & Hägglund, *Advanced PID
    Control*, 2006, give 1.2-2.0 as the usual range). A single controller is searched minimising the
    worst ratio of Ms and IAE ratio to their limits; the verdict is "single" when its uncut
    simulation and exact margins meet both limits at every point. A schedule merges neighbouring
    levels greedily while one controller serves them; its figures are reported at every tested level
    for the settings the table tells the user to apply (interpolated between rows).
    """
    if not ms_max > 1.0:
        raise DataError(f"ms_max must be above 1; got {ms_max!r}", hint="typical limits are 1.2 to 2.0")
    if not slowdown_max >= 1.0:
        raise DataError(f"slowdown_max must be at least 1; got {slowdown_max!r}")
    params = params[~excluded_mask(params)]  # excluded tests never enter the verdict
    used = usable_tests(params, against=against)
    opmap = opmap or build_map(params, against=against)
    campaigns: list = list(used["campaign"].dropna().unique()) if "campaign" in used.columns else []
    campaign = str(campaigns[0]) if len(campaigns) == 1 else None
    input_range, output_range = _ranges(ranges)
    processes, locals_, notes = _processes(opmap, rule, closed_loop_time)
    summary = {row["parameter"]: row for row in opmap.summary()}
    variation = {name: {k: row[k] for k in ("min", "max", "ratio", "significant")} for name, row in summary.items()}

    if len({math.copysign(1.0, p[1]) for p in processes}) > 1:
        raise DataError("the process gain changes sign across the tested range; no PI loop with one "
                        "controller action can serve it",
                        hint="check the tests near the sign change (`mapper params`); split the range")
    points = make_points(processes, locals_)
    table = CandidateTable.build(points, ms_max, slowdown_max)
    controller, _ = search(points, ms_max, slowdown_max, table=table)
    rows = measure(controller.kc, controller.ti, points)
    single = serves(rows, ms_max, slowdown_max)
    lag_dominant = opmap.model == "fopdt" and all(
        (p.time_constant or 0.0) >= LAG_DOMINANT_RATIO * p.dead_time for p in points)
    shortfall = check_sufficiency(used, against=against, output_range=output_range,
                                  loop_gain_trend=opmap.trend("gain_over_time_constant" if lag_dominant else "gain"))
    decision = "insufficient" if shortfall is not None else ("single" if single else "schedule")
    span = f"{against} {format_level(opmap.level_min)} to {format_level(opmap.level_max)}"
    reasons = _Reasons()
    if shortfall is not None:
        reasons.add("insufficient_data", shortfall.sentence, **shortfall.numbers())
    _performance_reasons(reasons, rows, controller, single, span, against, ms_max, slowdown_max)
    _variation_reasons(reasons, opmap, summary, points, decision)

    schedule, applied = [], []
    if decision != "insufficient":
        if single:
            bands = [(0, len(points), controller)]
        else:
            bands = _bands(points, table, ms_max, slowdown_max)
            reasons.add("schedule_bands", f"A schedule of {len(bands)} bands serves the range. {INTERPOLATION_NOTE}",
                        bands=len(bands))
        schedule, applied = _schedule(bands, points, input_range, output_range, opmap.level_min, opmap.level_max,
                                      applied=rows if single else None)
        for start, end, _ in bands:
            inside = applied[start:end]
            if not serves(inside, ms_max, slowdown_max):
                low, high = points[start].level, points[end - 1].level
                worst_ms = max(r["ms"] for r in inside)
                worst_ratio = max(r["iae_ratio"] for r in inside)
                reasons.add("band_unmet",
                            f"Between {against} {format_level(low)} and {format_level(high)} no PI controller found "
                            f"meets both limits even on its own (best: Ms {worst_ms:.2f}, slowdown {worst_ratio:.2f}); "
                            f"relax the limits or expect more than a PI loop can give there.",
                            level_from=low, level_to=high, ms=worst_ms, iae_ratio=worst_ratio)
    settings = controller.settings(input_range=input_range, output_range=output_range)
    settings.update({"serves_whole_range": single and decision == "single", "local_rule": rule, "caution": CAUTION})
    return Verdict(decision=decision, reasons=tuple(reasons.texts), variation=variation, controller=settings,
                   points=tuple(rows), schedule=tuple(schedule), ms_max=float(ms_max),
                   slowdown_max=float(slowdown_max), against=against, notes=tuple(notes) + opmap.notes,
                   reason_codes=tuple(reasons.codes), reason_details=tuple(reasons.details),
                   schedule_points=tuple(applied), campaign=campaign)
