"""Comparisons of step tests: repeats at one level, up against down steps, campaign against campaign.

Every function takes rows of the store view ``test_params`` (rejected tests are left out) and returns
a list of dicts, one per compared quantity, each with a ``sentence`` a person reads and the numbers
behind it. Differences count only when they exceed the 95 % uncertainty of what is compared.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import stats

from mapper.analysis.opmap import UNITS, build_map, format_level, parameter_values, usable_tests
from mapper.analysis.trends import LABELS, cluster_levels
from mapper.constants import Z95

COMPARED = ("gain", "time_constant", "dead_time")
CAUSES = {
    "gain": ("usual causes: a deadband or sticking valve (part of the step lost in one direction), "
             "or a process that answers differently rising and falling (asymmetric process)"),
    "dead_time": ("usual causes: a deadband or sticking valve (the actuator starts moving late in one "
                  "direction), or an asymmetric process"),
    "time_constant": ("usual causes: an asymmetric process (e.g. filling against draining, heating "
                      "against cooling), or a valve that moves at different speeds each way"),
}


def _fmt(value: float) -> str:
    return "n/a" if value is None or not np.isfinite(value) else f"{value:.4g}"


def _weighted(values: np.ndarray, sigma: np.ndarray):
    """Weighted mean, its standard error (inflated by the Birge ratio when repeats scatter more
    than their intervals), chi-square about the mean, and degrees of freedom."""
    weight = 1.0 / sigma ** 2
    mean = float(np.sum(weight * values) / np.sum(weight))
    se = float(1.0 / math.sqrt(np.sum(weight)))
    chi2 = float(np.sum(weight * (values - mean) ** 2))
    dof = values.size - 1
    if dof > 0 and chi2 > dof:
        se *= math.sqrt(chi2 / dof)
    return mean, se, chi2, dof


def _clean(values, sigma):
    keep = np.isfinite(values) & np.isfinite(sigma) & (sigma > 0)
    return values[keep], sigma[keep], keep


def _groups(params: pd.DataFrame, against: str, level_tolerance):
    frame = usable_tests(params, against)
    frame["_group"] = cluster_levels(frame["_x"].to_numpy(float), level_tolerance)
    if "direction" not in frame.columns:
        frame["direction"] = "unknown"
    return frame


def compare_repeats(params: pd.DataFrame, *, against: str = "level", level_tolerance: float | None = None
                    ) -> list[dict]:
    """Spread of repeated tests (same level, same direction) against their own intervals.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the store view ``test_params``.
    against : str
        Level column.
    level_tolerance : float, optional
        Levels closer than this count as the same; default 2 % of the tested span.

    Returns
    -------
    list of dict
        Per group and parameter: ``level, direction, parameter, n_tests, test_ids, min, max, mean,
        chi_square, dof, p_value, consistent, scatter_ratio, sentence``.

    Notes
    -----
    Chi-square of the repeats about their weighted mean with each test's standard deviation from its
    95 % interval; the repeats agree when ``p >= 0.05``. ``scatter_ratio = sqrt(chi2/dof)`` (Birge
    ratio, Birge 1932) says how many times wider the real scatter is than the intervals claim.
    """
    frame = _groups(params, against, level_tolerance)
    rows = []
    for (_group, direction), part in frame.groupby(["_group", "direction"], sort=True):
        if len(part) < 2:
            continue
        level = float(part["_x"].mean())
        for name in COMPARED:
            if name not in part.columns or part[name].isna().all():
                continue
            values, sigma = parameter_values(part, name)
            values, sigma, keep = _clean(values, sigma)
            if values.size < 2:
                continue
            mean, _, chi2, dof = _weighted(values, sigma)
            p_value = float(stats.chi2.sf(chi2, dof))
            consistent = p_value >= 0.05
            ratio = math.sqrt(chi2 / dof)
            unit = UNITS[name]
            verdict = ("consistent with their intervals" if consistent else
                       f"about {ratio:.1f} times wider than their intervals allow")
            sentence = (f"At {against} {format_level(level)} ({direction} steps), {values.size} repeats give "
                        f"{LABELS[name]} {_fmt(values.min())} to {_fmt(values.max())}{unit}: spread "
                        f"{verdict} (chi-square {chi2:.2f} on {dof} degrees of freedom, p {p_value:.2g}).")
            rows.append({"level": level, "direction": str(direction), "parameter": name,
                         "n_tests": int(values.size),
                         "test_ids": [v for v, k in zip(part.get("test_id", part.index), keep) if k],
                         "min": float(values.min()), "max": float(values.max()), "mean": mean,
                         "chi_square": chi2, "dof": dof, "p_value": p_value, "consistent": consistent,
                         "scatter_ratio": ratio, "sentence": sentence})
    return rows


def compare_directions(params: pd.DataFrame, *, against: str = "level", level_tolerance: float | None = None
                       ) -> list[dict]:
    """Up against down steps at each operating level.

    Returns
    -------
    list of dict
        Per level and parameter with both directions: ``level, parameter, up, down, difference,
        z, differs, cause, sentence``.

    Notes
    -----
    Each direction is summarised by its weighted mean; its standard error is inflated by the Birge
    ratio when its repeats scatter beyond their intervals. The directions differ when
    ``|up - down| / sqrt(se_up^2 + se_down^2) > 1.96`` (two-sided 5 %).
    """
    frame = _groups(params, against, level_tolerance)
    rows = []
    for _group, part in frame.groupby("_group", sort=True):
        up = part[part["direction"] == "up"]
        down = part[part["direction"] == "down"]
        if up.empty or down.empty:
            continue
        level = float(part["_x"].mean())
        for name in COMPARED:
            if name not in part.columns:
                continue
            u_val, u_sig, _ = _clean(*parameter_values(up, name))
            d_val, d_sig, _ = _clean(*parameter_values(down, name))
            if u_val.size == 0 or d_val.size == 0:
                continue
            u_mean, u_se, _, _ = _weighted(u_val, u_sig)
            d_mean, d_se, _, _ = _weighted(d_val, d_sig)
            difference = u_mean - d_mean
            z = difference / math.hypot(u_se, d_se)
            differs = abs(z) > Z95
            unit = UNITS[name]
            if differs:
                sentence = (f"At {against} {format_level(level)} the {LABELS[name]} differs between up "
                            f"({_fmt(u_mean)}{unit}) and down ({_fmt(d_mean)}{unit}) steps by "
                            f"{_fmt(difference)}{unit} ({abs(z):.1f} standard errors, beyond the 95 % "
                            f"uncertainty); {CAUSES[name]}.")
            else:
                sentence = (f"At {against} {format_level(level)} up and down steps agree on {LABELS[name]} "
                            f"({_fmt(u_mean)} against {_fmt(d_mean)}{unit}; the difference is inside the "
                            f"uncertainty).")
            rows.append({"level": level, "parameter": name, "up": u_mean, "down": d_mean,
                         "difference": difference, "z": float(z), "differs": bool(differs),
                         "cause": CAUSES[name] if differs else None, "sentence": sentence})
    return rows


def _campaign_name(params: pd.DataFrame, default: str) -> str:
    if "campaign" in params.columns and params["campaign"].notna().any():
        names = params["campaign"].dropna().astype(str).unique()
        return names[0] if len(names) == 1 else default
    return default


def compare_campaigns(params_a: pd.DataFrame, params_b: pd.DataFrame, *, against: str = "level",
                      names: tuple[str, str] | None = None) -> list[dict]:
    """Which parameters moved between two campaigns, where, and whether significantly.

    Parameters
    ----------
    params_a, params_b : pandas.DataFrame
        Rows of ``test_params`` for the older (A) and newer (B) campaign.
    against : str
        Level column.
    names : pair of str, optional
        Campaign names for the sentences; default from the ``campaign`` column.

    Returns
    -------
    list of dict
        Per parameter: ``parameter, campaign_a, campaign_b, moved, levels`` (where it moved),
        ``level`` (where the change is largest), ``value_a, value_b, change`` (relative), ``z``,
        ``sentence``. With no shared range, one row with ``parameter=None`` says so.

    Notes
    -----
    Both campaigns are mapped (:func:`mapper.analysis.opmap.build_map`) and their trends compared at the tested
    levels inside the shared range; a change is significant where the difference exceeds 1.96 times
    the combined standard error of the two trends.
    """
    name_a, name_b = names or (_campaign_name(params_a, "A"), _campaign_name(params_b, "B"))
    map_a, map_b = build_map(params_a, against=against), build_map(params_b, against=against)
    low, high = max(map_a.level_min, map_b.level_min), min(map_a.level_max, map_b.level_max)
    if low > high:
        return [{"parameter": None, "campaign_a": name_a, "campaign_b": name_b, "moved": None, "levels": [],
                 "sentence": (f"Campaigns {name_a} ({format_level(map_a.level_min)} to "
                              f"{format_level(map_a.level_max)}) and {name_b} "
                              f"({format_level(map_b.level_min)} to {format_level(map_b.level_max)}) "
                              f"share no tested range; nothing to compare.")}]
    levels = np.array(sorted({v for v in map_a.levels + map_b.levels if low <= v <= high}) or [low])
    rows = []
    for name in COMPARED + ("gain_over_time_constant",):
        if name not in map_a.trends or name not in map_b.trends:
            continue
        va, la, ha = map_a.value(name, levels)
        vb, lb, hb = map_b.value(name, levels)
        se = np.hypot((ha - la) / (2 * Z95), (hb - lb) / (2 * Z95))
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, (vb - va) / se, 0.0)
            change = np.where(va != 0, (vb - va) / np.abs(va), np.nan)
        moved_at = levels[np.abs(z) > Z95]
        k = int(np.argmax(np.abs(z)))
        unit = UNITS[name]
        if moved_at.size:
            where = ", ".join(format_level(v) for v in moved_at)
            sentence = (f"{LABELS[name].capitalize()} moved between {name_a} and {name_b}: at {against} "
                        f"{format_level(levels[k])} from {_fmt(va[k])}{unit} to {_fmt(vb[k])}{unit} "
                        f"({change[k]:+.0%}); significant at {against} {where}.")
        else:
            sentence = (f"{LABELS[name].capitalize()} did not move significantly between {name_a} and "
                        f"{name_b} over the shared range {format_level(low)} to {format_level(high)} "
                        f"(largest difference "
                        f"{change[k]:+.0%} at {against} {format_level(levels[k])}, inside the uncertainty).")
        rows.append({"parameter": name, "campaign_a": name_a, "campaign_b": name_b,
                     "moved": bool(moved_at.size), "levels": [float(v) for v in moved_at],
                     "level": float(levels[k]), "value_a": float(va[k]), "value_b": float(vb[k]),
                     "change": float(change[k]), "z": float(z[k]), "sentence": sentence})
    return rows
