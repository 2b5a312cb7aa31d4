"""Comparisons of step tests: repeats at one level, up against down steps, campaign against campaign.

Every function takes rows of the store view ``test_params`` (rejected and excluded tests are left out)
and returns a list of dicts, one per compared quantity, each with a ``sentence`` a person reads and the
numbers behind it. Differences count only when they exceed the 95 % uncertainty of what is compared,
with the test intervals widened by the scatter repeats show beyond them, and with the threshold raised
for the number of comparisons made at once (Bonferroni), so that a plant that merely wanders does not
show "significant" differences.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy import special  # normal and chi-square tails: the values of scipy.stats without its load time

from mapper.analysis.opmap import UNITS, OperatingMap, build_map, format_level, parameter_values, usable_tests
from mapper.analysis.shapes import pure_error_scatter
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


def bonferroni_point(count: int) -> float:
    """Two-sided normal point for ``count`` comparisons at a family-wise 5 % (Bonferroni, 1936)."""
    return float(-special.ndtri(0.025 / max(int(count), 1)))  # upper normal point: -Phi^-1(p)


def _relative_scatter(frame: pd.DataFrame, name: str) -> float:
    """Relative extra scatter of repeats (same level, same direction) beyond their intervals.

    Paule-Mandel on the pure error of every (level, direction) group of the campaign, in the
    logarithm (a relative scatter, so levels with large values do not dominate); 0 without repeats or
    when the repeats agree with their intervals.
    """
    values, sigma = parameter_values(frame, name)
    keep = np.isfinite(values) & np.isfinite(sigma) & (sigma > 0) & (values != 0)
    if keep.sum() < 3:
        return 0.0
    part = frame[keep]
    groups = part.groupby(["_group", "direction"], sort=False).ngroup().to_numpy()
    magnitude = np.abs(values[keep])
    s2, _ = pure_error_scatter(np.log(magnitude), sigma[keep] / magnitude, groups)
    return math.sqrt(s2)


def _widened(values: np.ndarray, sigma: np.ndarray, relative: float) -> np.ndarray:
    return np.sqrt(sigma ** 2 + (relative * values) ** 2)


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
            p_value = float(special.chdtrc(dof, chi2))  # chi-square survival function
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
    Each test's standard deviation (from its 95 % interval) is widened by the relative extra scatter
    of repeats across the whole campaign (Paule & Mandel, 1982, on the pure error of every level and
    direction), so slow wander that the intervals miss widens every comparison, even at levels
    without repeats. Each direction is summarised by its weighted mean (standard error inflated by
    the Birge ratio, Birge 1932, when its own repeats still scatter beyond that). The directions
    differ when ``|up - down| / sqrt(se_up^2 + se_down^2)`` exceeds the two-sided Bonferroni point
    for the parameters compared at a level (5 % for the level as a whole), so that a symmetric plant
    shows a difference at no more than about one level in twenty.
    """
    frame = _groups(params, against, level_tolerance)
    scatter = {name: _relative_scatter(frame, name) for name in COMPARED if name in frame.columns}
    critical = bonferroni_point(len(scatter))
    rows = []
    for _, part in frame.groupby("_group", sort=True):
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
            u_mean, u_se, _, _ = _weighted(u_val, _widened(u_val, u_sig, scatter[name]))
            d_mean, d_se, _, _ = _weighted(d_val, _widened(d_val, d_sig, scatter[name]))
            difference = u_mean - d_mean
            z = difference / math.hypot(u_se, d_se)
            differs = abs(z) > critical
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


def _side(opmap: OperatingMap, name: str, level: float, tolerance: float, *, any_trend: bool = False):
    """Value and standard error of one campaign at ``level``: its own tests there when it tested that
    level (pooled, outliers left out), else its trend; with the source. None when the level was not
    tested and the trend passes through every level mean (its course between levels is unverified),
    unless ``any_trend``."""
    trend = opmap.trend(name)
    if trend is None:
        return None
    for check in trend.level_checks:
        if abs(check["level"] - level) <= tolerance:
            se = (check["pooled_hi"] - check["pooled_lo"]) / (2 * Z95)
            return check["pooled"], se, "tests"
    saturated = trend.shape_spec is not None and trend.shape_spec.n_coefficients >= trend.n_levels
    if saturated and not any_trend:
        return None
    value, lo, hi = opmap.value(name, level)
    return value, (hi - lo) / (2 * Z95), "trend"


def compare_campaigns(params_a: pd.DataFrame, params_b: pd.DataFrame, *, against: str = "level",
                      names: tuple[str, str] | None = None,
                      maps: tuple[OperatingMap, OperatingMap] | None = None) -> list[dict]:
    """Which parameters moved between two campaigns, where, and whether significantly.

    Parameters
    ----------
    params_a, params_b : pandas.DataFrame
        Rows of ``test_params`` for the older (A) and newer (B) campaign.
    against : str
        Level column.
    names : pair of str, optional
        Campaign names for the sentences; default from the ``campaign`` column.
    maps : pair of OperatingMap, optional
        The maps already built from ``params_a`` and ``params_b`` against ``against``
        (:func:`mapper.analysis.opmap.build_map`); built here when not given.

    Returns
    -------
    list of dict
        Per parameter: ``parameter, campaign_a, campaign_b, moved, levels`` (where it moved),
        ``level`` (where the change is largest in standard errors), ``value_a, value_b`` and
        ``change_at_level`` (relative) there, ``z``, ``change`` (relative, inverse-variance weighted over
        the compared levels), ``compared`` (per level: ``level, value_a, value_b, source_a, source_b,
        z``) and ``sentence``.
        With no shared range, one row with ``parameter=None`` says so.

    Notes
    -----
    The campaigns are compared at every tested level inside the shared range. At a level a campaign
    tested, its own tests speak (their pooled value and interval, outliers against the trend left
    out), so a trend shape that misses its tests cannot create a change; at a level only the other
    campaign tested, the trend of the map (:func:`mapper.analysis.opmap.build_map`) with its band
    stands in, unless that trend passes through every level mean (piecewise, or as many coefficients
    as levels: its course between levels is then unverified and the level is not compared, as long as
    some level is). A parameter moved where the difference exceeds, in combined standard errors, the
    two-sided Bonferroni point for all the comparisons made (every parameter at every level), so the
    comparison as a whole calls a change on an unchanged plant in at most about 5 % of cases.
    """
    name_a, name_b = names or (_campaign_name(params_a, "A"), _campaign_name(params_b, "B"))
    map_a, map_b = maps or (build_map(params_a, against=against), build_map(params_b, against=against))
    low, high = max(map_a.level_min, map_b.level_min), min(map_a.level_max, map_b.level_max)
    if low > high:
        return [{"parameter": None, "campaign_a": name_a, "campaign_b": name_b, "moved": None, "levels": [],
                 "sentence": (f"Campaigns {name_a} ({format_level(map_a.level_min)} to "
                              f"{format_level(map_a.level_max)}) and {name_b} ({format_level(map_b.level_min)} "
                              f"to {format_level(map_b.level_max)}) share no tested range; nothing to compare.")}]
    tested = np.array(map_a.levels + map_b.levels)
    span = max(map_a.level_max, map_b.level_max) - min(map_a.level_min, map_b.level_min)
    tolerance = max(0.02 * span, 0.005 * float(np.max(np.abs(tested))))
    labels = cluster_levels(tested, tolerance)
    levels = np.array(sorted(float(np.mean(tested[labels == k])) for k in range(labels.max() + 1)))
    levels = levels[(levels >= low - tolerance) & (levels <= high + tolerance)].clip(low, high)
    if levels.size == 0:
        levels = np.array([low])
    chosen = {}
    for name in COMPARED + ("gain_over_time_constant",):
        if name not in map_a.trends or name not in map_b.trends:
            continue
        pairs = [(float(level), _side(map_a, name, float(level), tolerance),
                  _side(map_b, name, float(level), tolerance)) for level in levels]
        pairs = [p for p in pairs if p[1] is not None and p[2] is not None]
        if not pairs:  # every level needs a trend whose course between levels is unverified: use it anyway
            pairs = [(float(level), _side(map_a, name, float(level), tolerance, any_trend=True),
                      _side(map_b, name, float(level), tolerance, any_trend=True)) for level in levels]
        chosen[name] = pairs
    # One family for the whole comparison: every parameter at every level compared.
    critical = bonferroni_point(sum(len(pairs) for pairs in chosen.values()))
    rows = []
    for name, pairs in chosen.items():
        used = np.array([p[0] for p in pairs])
        compared = []
        for level, (value_a, se_a, source_a), (value_b, se_b, source_b) in pairs:
            combined = math.hypot(se_a, se_b)
            score = (value_b - value_a) / combined if combined > 0 and np.isfinite(combined) else 0.0
            compared.append({"level": float(level), "value_a": float(value_a), "value_b": float(value_b),
                             "source_a": source_a, "source_b": source_b, "z": float(score),
                             "se": float(combined)})
        z = np.array([c["z"] for c in compared])
        va = np.array([c["value_a"] for c in compared])
        vb = np.array([c["value_b"] for c in compared])
        se = np.array([c.pop("se") for c in compared])
        with np.errstate(divide="ignore", invalid="ignore"):
            change = np.where(va != 0, (vb - va) / np.abs(va), np.nan)
            weight = np.where(np.isfinite(change) & (se > 0), (np.abs(va) / se) ** 2, 0.0)
        # Overall relative change: inverse-variance weighted over the compared levels.
        overall = float(np.sum(weight * np.nan_to_num(change)) / np.sum(weight)) if weight.sum() > 0 else math.nan
        moved_at = used[np.abs(z) > critical]
        k = int(np.argmax(np.abs(z)))
        unit = UNITS[name]
        label = LABELS[name].capitalize()
        if moved_at.size:
            where = ", ".join(format_level(v) for v in moved_at)
            sentence = (f"{label} moved between {name_a} and {name_b}: at {against} "
                        f"{format_level(used[k])} from {_fmt(va[k])}{unit} to {_fmt(vb[k])}{unit} "
                        f"({change[k]:+.0%}; {overall:+.0%} over the {used.size} compared levels); "
                        f"significant at {against} {where}.")
        else:
            sentence = (f"{label} did not move significantly between {name_a} and {name_b} over the shared "
                        f"range {format_level(low)} to {format_level(high)} (largest difference "
                        f"{change[k]:+.0%} at {against} {format_level(used[k])}, inside the uncertainty).")
        rows.append({"parameter": name, "campaign_a": name_a, "campaign_b": name_b,
                     "moved": bool(moved_at.size), "levels": [float(v) for v in moved_at],
                     "level": float(used[k]), "value_a": float(va[k]), "value_b": float(vb[k]),
                     "change": overall, "change_at_level": float(change[k]), "z": float(z[k]),
                     "compared": compared, "sentence": sentence})
    return rows
