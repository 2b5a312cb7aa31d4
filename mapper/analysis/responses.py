"""Simulated closed-loop responses behind the verdict, for the report's chart.

This module owns the curves the report shows: after a unit load step at the plant input and after a
unit setpoint step, at the lowest, middle and highest tested levels, for the single controller, the
schedule as applied and the locally tuned controller (the reference of the IAE ratio). The curves are
simulated as in :mod:`mapper.analysis.closedloop` (exact dead time).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from mapper.analysis.closedloop import SAMPLES_PER_TIME_SCALE, simulate_loops

__all__ = ["response_rows"]

CURVE_POINTS = 160  # samples kept per curve


def _chosen(points: list) -> list:
    """Lowest, middle and highest tested level (fewer when fewer were tested)."""
    if len(points) <= 3:
        return list(points)
    return [points[0], points[len(points) // 2], points[-1]]


def response_rows(verdict: Mapping[str, Any]) -> list[dict]:
    """Rows ``level, step, controller, time, output`` for the closed-loop response chart.

    Parameters
    ----------
    verdict : mapping
        The shape of ``mapper verdict --format json`` (``points`` with the process and local tuning at
        each level, ``schedule_points`` with the schedule as applied).

    Returns
    -------
    list of dict
        ``step`` is ``"load"`` or ``"setpoint"``; ``controller`` is ``"single"``, ``"schedule"`` or
        ``"local"``; outputs per unit step, time in s.
    """
    points = list(verdict.get("points") or [])
    if not points:
        return []
    schedule = {round(float(p["level"]), 12): p for p in verdict.get("schedule_points") or []}
    single = verdict.get("controller") or {}
    rows: list[dict] = []
    for point in _chosen(points):
        controllers = {"local": (point["kc_local"], point["ti_local"])}
        if single.get("kc") is not None:
            controllers["single"] = (single["kc"], single["ti"])
        applied = schedule.get(round(float(point["level"]), 12))
        if applied is not None and applied.get("kc") is not None and verdict.get("decision") == "schedule":
            controllers["schedule"] = (applied["kc"], applied["ti"])
        names = list(controllers)
        kc = np.array([controllers[n][0] for n in names], dtype=float)
        ti = np.array([controllers[n][1] for n in names], dtype=float)
        theta = float(point["dead_time"])
        tau = point.get("time_constant")
        integrating = tau is None or (isinstance(tau, float) and math.isnan(tau))
        scale = 2 * theta if theta > 0 else 0.1 * float(point["ti_local"])
        period = scale / SAMPLES_PER_TIME_SCALE
        for step in ("load", "setpoint"):
            result = simulate_loops(kc, ti, point["gain"], np.nan if integrating else tau, theta, period,
                                    integrating=integrating, setpoint=step == "setpoint", keep=True,
                                    max_steps=8192)
            outputs = result.outputs or []
            times = result.times or []
            reference = 1.0 if step == "setpoint" else 0.0
            # Show until the slowest curve has come within 2 % of its peak deviation to stay.
            end = 0.0
            for t, y in zip(times, outputs):
                deviation = np.abs(y - reference)
                big = np.flatnonzero(deviation > 0.02 * max(float(deviation.max()), 1e-12))
                end = max(end, float(t[big[-1]]) if big.size else 0.0)
            end = 1.2 * end if end > 0 else float(max(len(t) for t in times) * period)
            for name, t, y in zip(names, times, outputs):
                keep = t <= end
                t_kept, y_kept = np.concatenate([[0.0], t[keep]]), np.concatenate([[0.0], y[keep]])
                pick = np.unique(np.linspace(0, t_kept.size - 1, min(CURVE_POINTS, t_kept.size)).astype(int))
                rows += [{"level": float(point["level"]), "step": step, "controller": name,
                          "time": float(t_kept[i]), "output": float(y_kept[i])} for i in pick]
    return rows
