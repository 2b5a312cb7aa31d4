"""Operating map: how gain, time constant and dead time move with the operating level.

This module owns the trends of each identified parameter against the operating level (or any other
column, e.g. the input), their 95 % bands, the variation over the tested range and whether that
variation is significant, and lookups at any level inside the range. Comparisons of tests (repeats,
up against down, campaign against campaign) live in :mod:`mapper.analysis.compare`.

The trend fitting itself (weighted polynomials, extra scatter, shape choice) is in :mod:`mapper.analysis.trends`.

Input is a ``pandas.DataFrame`` with the columns of the store view ``test_params``. Rejected tests and
tests marked ``excluded`` (when that column exists) are left out; so are outliers against the trend,
which are named with their reason (:attr:`OperatingMap.outliers`).
Units: time constant and dead time in s, gain in output units per input unit (for an
integrating model: output units per second per input unit), ``gain_over_time_constant`` in output
units per input unit per second.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from mapper.analysis.trends import LABELS, Trend, cluster_levels, fit_trend
from mapper.constants import RELEVANT_CHANGE_RATIO, Z95
from mapper.errors import DataError, OutOfRangeError
from mapper.identification.flags import flag_text

PARAMETERS = ("gain", "time_constant", "dead_time", "gain_over_time_constant")
UNITS = {"gain": "", "time_constant": " s", "dead_time": " s", "gain_over_time_constant": " per s"}
SHAPE_TEXT = {"constant": "constant", "linear": "straight", "quadratic": "quadratic",
              "log_linear": "straight in log scale (grows by a factor)",
              "log_quadratic": "curved in log scale", "piecewise_linear": "piecewise linear through the level means"}


def excluded_mask(params: pd.DataFrame) -> np.ndarray:
    """True for rows marked ``excluded`` (all False when the column is absent)."""
    if "excluded" not in params.columns:
        return np.zeros(len(params), dtype=bool)
    return np.array([bool(v) if v is not None and v == v else False for v in params["excluded"]], dtype=bool)


def describe_test(row) -> str:
    """``test 17 (step_40_up.csv, up step at level 40.0)`` for sentences."""
    get = row.get if hasattr(row, "get") else (lambda key, default=None: default)
    parts = [str(get("file"))] if get("file") is not None else []
    window = get("window")
    if window is not None and window == window:
        parts.append(f"window {window}")
    direction = get("direction")
    level = get("_x", get("level"))
    if level is not None:
        step = f"{direction} step " if direction in ("up", "down") else ""
        parts.append(f"{step}at level {format_level(float(level))}")
    ident = get("test_id")
    name = f"test {int(ident)}" if ident is not None and ident == ident else "a test"
    return f"{name} ({', '.join(parts)})" if parts else name


def sigma_from_interval(lo, hi) -> np.ndarray:
    """Standard deviation implied by a 95 % interval (half its width over 1.96); NaN when missing."""
    lo = pd.to_numeric(pd.Series(lo), errors="coerce").to_numpy(float)
    hi = pd.to_numeric(pd.Series(hi), errors="coerce").to_numpy(float)
    return (hi - lo) / (2.0 * Z95)


def usable_tests(params: pd.DataFrame, against: str = "level") -> pd.DataFrame:
    """Tests that are not rejected or excluded and have a finite operating level, sorted by level.

    Raises
    ------
    DataError
        When a needed column is missing or no test is left.
    """
    missing = [c for c in ("quality", "model", "gain", "dead_time", against) if c not in params.columns]
    if missing:
        raise DataError(f"parameter table lacks column(s) {missing}",
                        hint="pass the rows of the store view test_params")
    frame = params[(params["quality"].astype(str) != "rejected").to_numpy() & ~excluded_mask(params)].copy()
    frame["_x"] = pd.to_numeric(frame[against], errors="coerce")
    frame = frame[np.isfinite(frame["_x"].to_numpy(float))]
    frame = frame[frame["model"].isin(("fopdt", "integrating"))]
    if frame.empty:
        raise DataError(f"no usable test: every test is rejected, excluded, lacks a model or lacks '{against}'",
                        hint="check `mapper params` for the quality flags and exclusions")
    return frame.sort_values("_x").reset_index(drop=True)


def parameter_values(frame: pd.DataFrame, parameter: str):
    """Values and standard deviations of one parameter per test (``gain_over_time_constant`` derived).

    Notes
    -----
    ``K/tau`` gets its standard deviation by first-order propagation with independent errors:
    ``(s_r/r)^2 = (s_K/K)^2 + (s_tau/tau)^2``.
    """
    if parameter == "gain_over_time_constant":
        k = pd.to_numeric(frame["gain"], errors="coerce").to_numpy(float)
        tau = pd.to_numeric(frame["time_constant"], errors="coerce").to_numpy(float)
        sk = sigma_from_interval(frame["gain_lo"], frame["gain_hi"])
        st = sigma_from_interval(frame["time_constant_lo"], frame["time_constant_hi"])
        with np.errstate(divide="ignore", invalid="ignore"):
            value = np.where(tau > 0, k / tau, np.nan)
            sigma = np.abs(value) * np.sqrt((sk / k) ** 2 + (st / tau) ** 2)
        return value, sigma
    value = pd.to_numeric(frame[parameter], errors="coerce").to_numpy(float)
    sigma = sigma_from_interval(frame[f"{parameter}_lo"], frame[f"{parameter}_hi"])
    return value, sigma


def format_level(value: float) -> str:
    """A level for sentences: three significant figures, at least one decimal (80.0, 4.00, 0.987)."""
    if value is None or not np.isfinite(value):
        return "n/a"
    if value == 0:
        return "0.0"
    digits = max(1, 2 - int(math.floor(math.log10(abs(value)))))
    return f"{value:.{digits}f}"


def format_limit(value: float) -> str:
    """A limit for sentences: 2.0, 1.5, 1.25."""
    return f"{value:.1f}" if abs(value * 10 - round(value * 10)) < 1e-9 else f"{value:g}"


def _p(value: float) -> str:
    return "p < 0.001" if value < 0.001 else f"p {value:.2g}"


def _fmt(value: float) -> str:
    if value is None or not np.isfinite(value):
        return "n/a"
    return f"{value:.4g}"


@dataclass(frozen=True)
class OperatingMap:
    """Trends of the process parameters over the tested operating range.

    Build with :func:`build_map`. ``trends`` maps parameter names to :class:`Trend`; an integrating
    map has only ``gain`` (the integrating gain) and ``dead_time``. ``outliers`` lists the tests that
    disagree with their neighbours beyond their uncertainty, one dict per test and parameter:
    ``test_id, parameter, level, value, expected, z, left_out, flag, sentence``. ``test_ids`` are
    the tests the map was built from (outliers included). ``depends_on`` holds the single tests the
    map's conclusions hang on once :func:`mapper.analysis.influence.with_influence` has filled it.
    """

    against: str
    model: str
    level_min: float
    level_max: float
    levels: tuple
    trends: dict
    n_tests: int
    notes: tuple = field(default=())
    outliers: tuple = field(default=())
    test_ids: tuple = field(default=())
    depends_on: tuple = field(default=())
    influence_sentence: str = ""

    def trend(self, parameter: str) -> Trend | None:
        return self.trends.get(parameter)

    def value(self, parameter: str, level, *, significant_only: bool = False):
        """``(value, lo, hi)`` of one parameter at ``level`` (None triple when not mapped)."""
        trend = self.trends.get(parameter)
        if trend is None:
            return None, None, None
        return trend.evaluate(level, significant_only=significant_only)

    def at(self, level: float, *, extrapolate: bool = False) -> dict:
        """Gain, time constant and dead time with 95 % band at one operating level.

        Parameters
        ----------
        level : float
            Operating level, in the units of the column the map was built against.
        extrapolate : bool
            Allow levels outside the tested range; the result then carries a ``warning`` entry.

        Returns
        -------
        dict
            Keys ``level, gain, gain_lo, gain_hi, time_constant, time_constant_lo, time_constant_hi,
            dead_time, dead_time_lo, dead_time_hi`` (time constant None for an integrating map).

        Raises
        ------
        OutOfRangeError
            When ``level`` is outside the tested range and ``extrapolate`` is False.
        """
        level = float(level)
        tolerance = 1e-9 * (abs(self.level_max) + abs(self.level_min) + 1.0)
        outside = level < self.level_min - tolerance or level > self.level_max + tolerance
        if outside and not extrapolate:
            raise OutOfRangeError(
                f"{self.against} {format_level(level)} is outside the tested range "
                f"{format_level(self.level_min)} to {format_level(self.level_max)}",
                hint="ask inside the tested range, or allow extrapolation (at your own risk)",
            )
        out: dict[str, Any] = {"level": level}
        for name in ("gain", "time_constant", "dead_time"):
            value, lo, hi = self.value(name, level)
            if value is not None and name != "gain" and math.isfinite(lo):
                lo = max(lo, 0.0)
            out[name], out[f"{name}_lo"], out[f"{name}_hi"] = (
                v if v is None or math.isfinite(v) else None for v in (value, lo, hi))
        if outside:
            out["warning"] = (f"extrapolated: {self.against} {format_level(level)} is outside the tested range "
                              f"{format_level(self.level_min)} to {format_level(self.level_max)}; "
                              f"the trend shape is unverified there")
        return out

    def summary(self) -> list[dict]:
        """One row per parameter: shape, min, max, ratio, significant, data sufficiency, outliers and
        a reason sentence."""
        rows = []
        for name, trend in self.trends.items():
            var = trend.variation()
            label, unit = LABELS[name], UNITS[name]
            span = f"over {self.against} {format_level(self.level_min)} to {format_level(self.level_max)}"
            shape = SHAPE_TEXT.get(trend.shape, trend.shape)
            if trend.significant:
                direction = "rises" if var["at_high_end"] > var["at_low_end"] else "falls"
                reason = (f"{label} {direction} from {_fmt(var['at_low_end'])}{unit} to "
                          f"{_fmt(var['at_high_end'])}{unit} {span} (range {_fmt(var['min'])} to "
                          f"{_fmt(var['max'])}, ratio {_fmt(var['ratio'])}); {shape} trend chosen by "
                          f"lack of fit against the repeats and AICc; significant ({_p(trend.p_value)}) given "
                          f"the test intervals and the scatter of repeats")
            elif not trend.enough_data:
                where = ("add tests at two or more further levels across the operating range"
                         if not trend.levels_to_add else
                         f"add tests at {self.against} " + ", ".join(format_level(v) for v in trend.levels_to_add))
                if math.isfinite(trend.detectable_ratio):
                    seen = (f"still allow a change by a factor up to {trend.detectable_ratio:.2g}, and a factor of "
                            f"{RELEVANT_CHANGE_RATIO:g} already matters for the controller")
                else:
                    seen = (f"cannot show whether it moves (a change by the factor of {RELEVANT_CHANGE_RATIO:g} "
                            f"that matters for the controller could hide between or beyond them)")
                reason = (f"not enough tests to judge {label} {span}: {trend.n_tests} test(s) at "
                          f"{trend.n_levels} level(s) {seen}; {where} (with a repeat at each) to settle it")
            elif trend.shape == "constant":
                reason = (f"{label} stays at {_fmt(trend.constant)}{unit} within its uncertainty {span} "
                          f"(constant chosen by AICc over {trend.n_tests} tests; a change by a factor of "
                          f"{_fmt(trend.detectable_ratio)} or more would have shown)")
            else:
                reason = (f"{label}: a {shape} trend fits best but its change is not significant "
                          f"({_p(trend.p_value)}); variation inside the uncertainty is not variation")
            outliers = [o for o in self.outliers if o["parameter"] == name]
            for o in outliers:
                reason += "; " + o["sentence"]
            off = [c for c in trend.level_checks if not c["inside"]]
            for c in off:
                reason += (f"; at {self.against} {format_level(c['level'])} the map ({_fmt(c['value'])}{unit}) lies "
                           f"outside the pooled interval of its own {c['n_tests']} test(s) ({_fmt(c['pooled_lo'])} to "
                           f"{_fmt(c['pooled_hi'])}{unit})")
            rows.append({"parameter": name, "shape": trend.shape, "min": var["min"], "max": var["max"],
                         "ratio": var["ratio"], "significant": trend.significant,
                         "at_low_end": var["at_low_end"], "at_high_end": var["at_high_end"],
                         "p_value": trend.p_value, "lack_of_fit_p": trend.lack_of_fit_p,
                         "extra_scatter": trend.extra_scatter,
                         "n_tests": trend.n_tests, "n_levels": trend.n_levels,
                         "enough_data": trend.enough_data, "detectable_ratio": trend.detectable_ratio,
                         "levels_to_add": list(trend.levels_to_add),
                         "outliers": [o["test_id"] for o in outliers if o["left_out"]],
                         "outside_tested_levels": [c["level"] for c in off],
                         "flags": list(trend.flags), "reason": reason,
                         "depends_on": [d.to_dict() for d in self.depends_on
                                        if d.parameter in (name, None)]})
        return rows

    def trend_frame(self, points: int = 100) -> pd.DataFrame:
        """Long table ``parameter, level, value, lo, hi`` across the tested range, for charts."""
        grid = np.linspace(self.level_min, self.level_max, max(int(points), 2))
        parts = []
        for name, trend in self.trends.items():
            value, lo, hi = trend.evaluate(grid)
            if name in ("time_constant", "dead_time"):
                lo = np.maximum(lo, 0.0)
            parts.append(pd.DataFrame({"parameter": name, "level": grid, "value": value, "lo": lo, "hi": hi}))
        return pd.concat(parts, ignore_index=True)


def build_map(params: pd.DataFrame, *, against: str = "level", robust: bool = True) -> OperatingMap:
    """Fit the operating map of a campaign.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the store view ``test_params``; rejected tests are left out.
    against : str
        Column to map against: ``"level"`` (default) or any numeric column, e.g. an input position.
    robust : bool
        Look for outliers against the trend and leave them out (default True).

    Returns
    -------
    OperatingMap

    Raises
    ------
    DataError
        When the column is missing or no usable test is left.

    Notes
    -----
    When a campaign mixes FOPDT and integrating fits, the model most tests share is mapped and the
    others are left out with a note. Rows with ``excluded`` true are left out. See
    :func:`mapper.analysis.trends.fit_trend` for the trend method (shapes judged by lack of fit
    against the repeats, outliers against the trend left out and named).
    """
    frame = usable_tests(params, against)
    notes = []
    counts = frame["model"].value_counts()
    model = str(counts.index[0])
    if len(counts) > 1:
        notes.append(f"{int(counts.iloc[1:].sum())} test(s) with another model than '{model}' left out")
        frame = frame[frame["model"] == model]
    names = ("gain", "dead_time") if model == "integrating" else PARAMETERS
    trends, outliers = {}, []
    rows = frame.to_dict("records")
    for name in names:
        value, sigma = parameter_values(frame, name)
        if np.isfinite(value).any():
            trend = fit_trend(frame["_x"].to_numpy(float), value, sigma, name, robust=robust)
            trends[name] = trend
            outliers += [_outlier_row(rows[o.index], name, o) for o in trend.outliers]
    x = frame["_x"].to_numpy(float)
    labels = cluster_levels(x)
    levels = tuple(float(np.mean(x[labels == k])) for k in range(labels.max() + 1))
    ids = tuple(int(v) for v in frame["test_id"]) if "test_id" in frame.columns else ()
    return OperatingMap(against=against, model=model, level_min=float(x.min()), level_max=float(x.max()),
                        levels=levels, trends=trends, n_tests=int(len(frame)), notes=tuple(notes),
                        outliers=tuple(outliers), test_ids=ids)


def _outlier_row(row: dict, parameter: str, outlier) -> dict:
    unit = UNITS[parameter]
    action = "left out of the map" if outlier.left_out else "kept (the only test at an end of the range)"
    sentence = (f"{describe_test(row)} gives {LABELS[parameter]} {_fmt(outlier.value)}{unit} where its "
                f"neighbours expect {_fmt(outlier.expected)}{unit} (±{_fmt(Z95 * outlier.expected_sd)}{unit}, "
                f"{abs(outlier.z):.1f} standard deviations): an outlier against the trend, {action}")
    test_id = row.get("test_id")
    return {"test_id": int(test_id) if test_id is not None and test_id == test_id else None,
            "file": row.get("file"), "parameter": parameter, "level": outlier.level, "value": outlier.value,
            "expected": outlier.expected, "z": outlier.z, "left_out": outlier.left_out,
            "flag": outlier.flag, "text": flag_text(outlier.flag), "sentence": sentence}
