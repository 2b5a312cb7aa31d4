"""Verdict: does one PI controller serve the whole tested range, or is a gain schedule needed?

This module owns the decision, the reasons a person can defend, and the schedule table. The test is
robustness, not a ratio rule: one controller is tried over every tested operating point (found by a
search, not guessed), and it is enough when at every point the maximum sensitivity Ms stays at or
under a limit and the loop is at most a set factor slower than a controller tuned at that point.

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
from scipy.optimize import minimize

from mapper.analysis.margins import loop_margins, quick_peak_sensitivity, search_grid
from mapper.analysis.opmap import OperatingMap, build_map, format_level, format_limit
from mapper.analysis.tuning import PITuning, dimensionless_gain, tune
from mapper.errors import DataError
from mapper.records import plain

CAUTION = ("CAUTION: new tuning on a live plant can hurt people and equipment. Agree limits with "
           "operations, stay clear of alarm and trip limits, verify before use (in manual, with the "
           "loop watched), and defer to site procedures and licensed practice.")
INTERPOLATION_NOTE = ("Between rows, interpolate kc and ti linearly in level between the row levels; "
                      "outside the first and last row hold their values.")
LAG_DOMINANT_RATIO = 4.0  # time constant / dead time above which a loop counts as lag-dominant (common practice)
_KC_FACTORS = (1.0, 0.8, 0.64, 0.5, 0.4, 0.3)
_TI_FACTORS = (1.0, 1.5, 2.5)


@dataclass(frozen=True)
class Verdict:
    """Outcome of :func:`decide`.

    Attributes
    ----------
    decision : {"single", "schedule"}
    reasons : tuple of str
        Sentences with numbers.
    variation : dict
        ``{parameter: {"min", "max", "ratio", "significant"}}`` over the tested range.
    controller : dict
        The best single controller found (``serves_whole_range`` says whether it is enough).
    points : tuple of dict
        That controller at every tested level: ``level, ms, gain_margin, phase_margin_deg,
        slowdown`` plus the process and local tuning there.
    schedule : tuple of dict
        One row per operating band (a single row when one controller serves).
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

    def to_dict(self) -> dict:
        """The JSON shape of ``mapper verdict --format json`` (non-finite numbers become None)."""
        return plain({"decision": self.decision, "reasons": list(self.reasons),
                          "variation": self.variation, "controller": self.controller,
                          "points": list(self.points), "schedule": list(self.schedule)})

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
        columns = ["level", "level_from", "level_to", "kc", "ti", "ti_min"]
        if any("proportional_band" in row for row in self.schedule):
            columns += ["kc_dimensionless", "proportional_band"]
        columns += ["ms", "slowdown"]
        with open(path, "w", newline="", encoding="utf-8") as handle:
            handle.write(f"# mapper PI schedule; decision: {self.decision}\n")
            handle.write(f"# units: {self.against} in {unit_out}; kc in {unit_in} per {unit_out}; ti in s; "
                         f"ti_min in min; kc_dimensionless in %/%; proportional_band in %\n")
            handle.write(f"# limits: Ms <= {format_limit(self.ms_max)}; slowdown <= {format_limit(self.slowdown_max)} "
                         f"(integrated error against a controller tuned at each level)\n")
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


class _Point:
    """One operating point: process from the map, its local tuning and a fixed search grid."""

    def __init__(self, level, gain, time_constant, dead_time, model, local: PITuning):
        self.level, self.gain, self.time_constant, self.dead_time = level, gain, time_constant, dead_time
        self.model, self.local = model, local
        self.grid = search_grid(gain, time_constant, dead_time, local.ti, model=model)


def _points(opmap: OperatingMap, rule: str, closed_loop_time) -> tuple[list, list]:
    notes, points = [], []
    for level in opmap.levels:
        gain = opmap.value("gain", level, significant_only=True)[0]
        tau = opmap.value("time_constant", level, significant_only=True)[0] if opmap.model == "fopdt" else None
        theta = max(opmap.value("dead_time", level, significant_only=True)[0], 0.0)
        if tau is not None and not tau > 0:
            tau = opmap.trends["time_constant"].constant
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
        points.append(_Point(level, gain, tau, theta, opmap.model, local))
    return points, notes


def _score(kc, ti, points, ms_max, slowdown_max):
    """Worst over points of max(Ms / limit, slowdown / limit); <= 1 means the controller serves."""
    worst = 0.0
    speed = abs(kc) / ti
    for p in points:
        ms = quick_peak_sensitivity(kc, ti, p.gain, p.time_constant, p.dead_time, p.grid, model=p.model)
        worst = max(worst, ms / ms_max, p.local.integral_gain / speed / slowdown_max)
    return worst


def _search(points, ms_max, slowdown_max):
    """Best single PI controller over ``points``: candidate grid, then Nelder-Mead on log(kc), log(ti).

    Candidates are the local tunings at every point and their detuned versions (gain times
    0.3-1, integral time times 1-2.5), plus the geometric-mean controller; the minimax score is then
    polished by the Nelder-Mead simplex (Nelder & Mead, 1965).
    """
    sign = math.copysign(1.0, points[0].local.kc)
    bases = [(abs(p.local.kc), p.local.ti) for p in points]
    bases.append((float(np.exp(np.mean(np.log([b[0] for b in bases])))),
                  float(np.exp(np.mean(np.log([b[1] for b in bases]))))))
    # Aim a little inside the limits so the refined margins reported later stay within them.
    ms_aim, slow_aim = ms_max * 0.999, slowdown_max * 0.999
    best = (math.inf, None)
    for kc0, ti0 in bases:
        for fk in _KC_FACTORS:
            for ft in _TI_FACTORS:
                score = _score(sign * kc0 * fk, ti0 * ft, points, ms_aim, slow_aim)
                if score < best[0]:
                    best = (score, (kc0 * fk, ti0 * ft))
    if best[0] > 1.0:
        def objective(x):
            s = _score(sign * math.exp(x[0]), math.exp(x[1]), points, ms_aim, slow_aim)
            return s if math.isfinite(s) else 1e6
        result = minimize(objective, np.log(best[1]), method="Nelder-Mead",
                          options={"xatol": 1e-4, "fatol": 1e-5, "maxiter": 400})
        if result.fun < best[0]:
            best = (float(result.fun), tuple(np.exp(result.x)))
    kc, ti = (float(v) for v in best[1])
    return PITuning(kc=sign * kc, ti=ti, rule="single controller search"), best[0]


def _evaluate(controller: PITuning, points, against):
    rows = []
    for p in points:
        margins = loop_margins(controller.kc, controller.ti, p.gain, p.time_constant, p.dead_time, model=p.model)
        rows.append({"level": p.level, "ms": margins.ms, "gain_margin": margins.gain_margin,
                     "phase_margin_deg": margins.phase_margin_deg,
                     "slowdown": float(p.local.integral_gain / controller.integral_gain),
                     "gain": p.gain, "time_constant": p.time_constant, "dead_time": p.dead_time,
                     "kc_local": p.local.kc, "ti_local": p.local.ti})
    return rows


def _serves(rows, ms_max, slowdown_max) -> bool:
    return all(r["ms"] <= ms_max * (1 + 1e-6) and r["slowdown"] <= slowdown_max * (1 + 1e-6) for r in rows)


def _bands(points, ms_max, slowdown_max):
    """Greedy merge of neighbouring points while one controller serves them all."""
    bands, start = [], 0
    while start < len(points):
        end = start + 1
        controller, _ = _search(points[start:end], ms_max, slowdown_max)
        while end < len(points):
            trial, score = _search(points[start:end + 1], ms_max, slowdown_max)
            if score > 1.0:
                break
            controller, end = trial, end + 1
        bands.append((start, end, controller))
        start = end
    return bands


def _schedule_rows(bands, points, against, input_range, output_range, level_min, level_max):
    rows = []
    for i, (start, end, controller) in enumerate(bands):
        levels = [p.level for p in points[start:end]]
        low = level_min if i == 0 else 0.5 * (points[start - 1].level + points[start].level)
        high = level_max if end == len(points) else 0.5 * (points[end - 1].level + points[end].level)
        evaluated = _evaluate(controller, points[start:end], against)
        row = {"level": float(np.mean(levels)), "level_from": low, "level_to": high,
               "kc": controller.kc, "ti": controller.ti, "ti_min": controller.ti_min,
               "ms": max(r["ms"] for r in evaluated), "slowdown": max(r["slowdown"] for r in evaluated)}
        dimensionless = dimensionless_gain(controller.kc, input_range=input_range, output_range=output_range)
        if dimensionless is not None:
            row["kc_dimensionless"] = dimensionless
            row["proportional_band"] = 100.0 / abs(dimensionless)
        rows.append(row)
    return rows


def _variation_reasons(opmap: OperatingMap, summary: dict, points, decision: str) -> list[str]:
    reasons = [row["reason"][:1].upper() + row["reason"][1:] + "." for row in summary.values() if row["significant"]]
    sig = {name: row["significant"] for name, row in summary.items()}
    if not any(sig.values()):
        reasons.append("No parameter varies beyond its uncertainty over the tested range.")
    gain: dict = summary.get("gain") or {}
    lag_dominant = opmap.model == "fopdt" and all(
        p.time_constant >= LAG_DOMINANT_RATIO * p.dead_time for p in points)
    if (lag_dominant and sig.get("gain") and sig.get("time_constant")
            and not sig.get("gain_over_time_constant")):
        reasons.append(
            f"Gain (ratio {gain['ratio']:.2f}) and time constant (ratio {summary['time_constant']['ratio']:.2f}) "
            f"move together while gain / time constant stays within its uncertainty; the loop is lag-dominant "
            f"(time constant at least {LAG_DOMINANT_RATIO:g} times the dead time at every level), where K/tau, "
            f"not K, sets the controller, so a gain-ratio rule would overstate the need for a schedule.")
    dynamics = ("time_constant", "dead_time") if opmap.model == "fopdt" else ("dead_time",)
    if decision == "schedule" and sig.get("gain") and not any(sig.get(d) for d in dynamics):
        reasons.append(
            f"Only the gain moves (from {gain['min']:.4g} to {gain['max']:.4g}, ratio {gain['ratio']:.2f}); "
            f"the dynamics (time constant, dead time) stay within their uncertainty. Characterising the input "
            f"- a linearising curve on the valve/actuator output, the inverse of the gain curve - would serve "
            f"instead of a schedule, leaving one controller.")
    return reasons


def decide(params: pd.DataFrame, *, ms_max: float = 2.0, slowdown_max: float = 2.0,
           closed_loop_time: float | None = None, ranges=None, rule: str = "simc", against: str = "level",
           opmap: OperatingMap | None = None) -> Verdict:
    """Decide whether one PI controller serves every tested operating point or a schedule is needed.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the store view ``test_params`` (rejected tests are left out).
    ms_max : float
        Largest acceptable maximum sensitivity (default 2.0; Åström & Hägglund give 1.2-2.0).
    slowdown_max : float
        Largest acceptable factor by which the single controller may be slower than a locally tuned
        one (default 2), measured as the ratio of integrated errors after a load step.
    closed_loop_time : float, optional
        Closed-loop time constant (tau_c, s) for the local tunings; default the local dead time.
    ranges : dict or pair, optional
        Instrument ranges ``{"input": [lo, hi], "output": [lo, hi]}`` for proportional bands.
    rule : {"simc", "lambda"}
        Rule for the local tunings.
    against : str
        Level column for the map.
    opmap : OperatingMap, optional
        A map already built from ``params``.

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
    A single controller is then searched (:func:`_search`) minimising the worst ratio of Ms and
    slowdown to their limits; the verdict is "single" when that worst ratio is at most 1, judged
    again on the margins from the exact frequency response. Slowdown is the integrated error after
    a unit load step, ``IE = ti / kc`` (Åström & Hägglund, 1995), relative to the local tuning. A
    schedule merges neighbouring levels greedily while one controller serves them.
    """
    if not ms_max > 1.0:
        raise DataError(f"ms_max must be above 1; got {ms_max!r}", hint="typical limits are 1.2 to 2.0")
    if not slowdown_max >= 1.0:
        raise DataError(f"slowdown_max must be at least 1; got {slowdown_max!r}")
    opmap = opmap or build_map(params, against=against)
    input_range, output_range = _ranges(ranges)
    points, notes = _points(opmap, rule, closed_loop_time)
    summary = {row["parameter"]: row for row in opmap.summary()}
    variation = {name: {k: row[k] for k in ("min", "max", "ratio", "significant")} for name, row in summary.items()}

    if len({math.copysign(1.0, p.gain) for p in points}) > 1:
        raise DataError("the process gain changes sign across the tested range; no PI loop with one "
                        "controller action can serve it",
                        hint="check the tests near the sign change (`mapper params`); split the range")
    controller, _ = _search(points, ms_max, slowdown_max)
    rows = _evaluate(controller, points, against)
    single = _serves(rows, ms_max, slowdown_max)
    decision = "single" if single else "schedule"
    span = f"{against} {format_level(opmap.level_min)} to {format_level(opmap.level_max)}"
    worst_ms = max(rows, key=lambda r: r["ms"])
    worst_slow = max(rows, key=lambda r: r["slowdown"])
    reasons = []
    if single:
        reasons.append(
            f"One PI controller (kc {controller.kc:.4g}, ti {controller.ti:.4g} s) serves every tested level "
            f"({span}, {len(rows)} level{'s' if len(rows) > 1 else ''}): Ms at most {worst_ms['ms']:.2f} "
            f"(limit {format_limit(ms_max)}, at {against} {format_level(worst_ms['level'])}) and at most "
            f"{worst_slow['slowdown']:.2f} times slower than a locally tuned controller "
            f"(limit {format_limit(slowdown_max)}, at {against} {format_level(worst_slow['level'])}).")
    else:
        reasons.append(f"No single PI controller keeps Ms <= {format_limit(ms_max)} and slowdown <= "
                       f"{format_limit(slowdown_max)} at every tested level ({span}); the best one found "
                       f"(kc {controller.kc:.4g}, ti {controller.ti:.4g} s) fails as follows.")
        over_ms = [r for r in rows if r["ms"] > ms_max * (1 + 1e-6)]
        over_slow = [r for r in rows if r["slowdown"] > slowdown_max * (1 + 1e-6)]
        if over_ms:
            reasons.append(f"At {against} {format_level(worst_ms['level'])} the single controller reaches Ms "
                           f"{worst_ms['ms']:.2f} (limit {format_limit(ms_max)}); Ms is over the limit at "
                           f"{len(over_ms)} of {len(rows)} tested levels.")
        if over_slow:
            reasons.append(f"At {against} {format_level(worst_slow['level'])} the single controller is "
                           f"{worst_slow['slowdown']:.2f} times slower than one tuned there (limit "
                           f"{format_limit(slowdown_max)}); too slow at {len(over_slow)} of {len(rows)} tested levels.")
    if len(points) == 1:
        reasons.append(f"Only one operating level ({format_level(points[0].level)}) was tested; the verdict "
                       f"cannot speak for other levels.")
    reasons += _variation_reasons(opmap, summary, points, decision)

    if single:
        bands = [(0, len(points), controller)]
    else:
        bands = _bands(points, ms_max, slowdown_max)
        reasons.append(f"A schedule of {len(bands)} bands serves the range. {INTERPOLATION_NOTE}")
    schedule = _schedule_rows(bands, points, against, input_range, output_range,
                              opmap.level_min, opmap.level_max)
    for row in schedule:
        if not _serves([row], ms_max, slowdown_max):
            reasons.append(
                f"Between {against} {format_level(row['level_from'])} and {format_level(row['level_to'])} no PI "
                f"controller found meets both limits even on its own (best: Ms {row['ms']:.2f}, slowdown "
                f"{row['slowdown']:.2f}); relax the limits or expect more than a PI loop can give there.")
    settings = controller.settings(input_range=input_range, output_range=output_range)
    settings.update({"serves_whole_range": single, "local_rule": rule, "caution": CAUTION})
    return Verdict(decision=decision, reasons=tuple(reasons), variation=variation, controller=settings,
                   points=tuple(rows), schedule=tuple(schedule), ms_max=float(ms_max),
                   slowdown_max=float(slowdown_max), against=against, notes=tuple(notes) + opmap.notes)
