"""Operating map: how gain, time constant and dead time move with the operating level.

This module owns the trends of each identified parameter against the operating level (or any other
column, e.g. the input), their 95 % bands, the variation over the tested range and whether that
variation is significant, and lookups at any level inside the range. Comparisons of tests (repeats,
up against down, campaign against campaign) live in :mod:`mapper.analysis.compare`.

The trend fitting itself (weighted polynomials, extra scatter, shape choice) is in :mod:`mapper.analysis.trends`.

Input is a ``pandas.DataFrame`` with the columns of the store view ``test_params``. Rejected tests are
left out. Units: time constant and dead time in s, gain in output units per input unit (for an
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
from mapper.constants import Z95
from mapper.errors import DataError, OutOfRangeError

PARAMETERS = ("gain", "time_constant", "dead_time", "gain_over_time_constant")
UNITS = {"gain": "", "time_constant": " s", "dead_time": " s", "gain_over_time_constant": " per s"}


def sigma_from_interval(lo, hi) -> np.ndarray:
    """Standard deviation implied by a 95 % interval (half its width over 1.96); NaN when missing."""
    lo = pd.to_numeric(pd.Series(lo), errors="coerce").to_numpy(float)
    hi = pd.to_numeric(pd.Series(hi), errors="coerce").to_numpy(float)
    return (hi - lo) / (2.0 * Z95)


def usable_tests(params: pd.DataFrame, against: str = "level") -> pd.DataFrame:
    """Tests that are not rejected and have a finite operating level, sorted by level.

    Raises
    ------
    DataError
        When a needed column is missing or no test is left.
    """
    missing = [c for c in ("quality", "model", "gain", "dead_time", against) if c not in params.columns]
    if missing:
        raise DataError(f"parameter table lacks column(s) {missing}",
                        hint="pass the rows of the store view test_params")
    frame = params[params["quality"].astype(str) != "rejected"].copy()
    frame["_x"] = pd.to_numeric(frame[against], errors="coerce")
    frame = frame[np.isfinite(frame["_x"].to_numpy(float))]
    frame = frame[frame["model"].isin(("fopdt", "integrating"))]
    if frame.empty:
        raise DataError(f"no usable test: every test is rejected, lacks a model or lacks '{against}'",
                        hint="check `mapper params` for the quality flags")
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
    map has only ``gain`` (the integrating gain) and ``dead_time``.
    """

    against: str
    model: str
    level_min: float
    level_max: float
    levels: tuple
    trends: dict
    n_tests: int
    notes: tuple = field(default=())

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
        """One row per parameter: shape, min, max, ratio, significant and a reason sentence."""
        rows = []
        for name, trend in self.trends.items():
            var = trend.variation()
            label, unit = LABELS[name], UNITS[name]
            span = f"over {self.against} {format_level(self.level_min)} to {format_level(self.level_max)}"
            if trend.significant:
                direction = "rises" if var["at_high_end"] > var["at_low_end"] else "falls"
                reason = (f"{label} {direction} from {_fmt(var['at_low_end'])}{unit} to "
                          f"{_fmt(var['at_high_end'])}{unit} {span} (range {_fmt(var['min'])} to "
                          f"{_fmt(var['max'])}, ratio {_fmt(var['ratio'])}); {trend.shape} trend chosen by "
                          f"AICc; significant ({_p(trend.p_value)}) given the test intervals and the "
                          f"scatter of repeats")
            elif trend.shape == "constant":
                reason = (f"{label} stays at {_fmt(trend.constant)}{unit} within its uncertainty {span} "
                          f"(constant chosen by AICc over {trend.n_tests} tests)")
            else:
                reason = (f"{label}: a {trend.shape} trend fits best but its change is not significant "
                          f"({_p(trend.p_value)}); variation inside the uncertainty is not variation")
            rows.append({"parameter": name, "shape": trend.shape, "min": var["min"], "max": var["max"],
                         "ratio": var["ratio"], "significant": trend.significant,
                         "at_low_end": var["at_low_end"], "at_high_end": var["at_high_end"],
                         "p_value": trend.p_value, "extra_scatter": trend.extra_scatter,
                         "n_tests": trend.n_tests, "n_levels": trend.n_levels, "reason": reason})
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


def build_map(params: pd.DataFrame, *, against: str = "level") -> OperatingMap:
    """Fit the operating map of a campaign.

    Parameters
    ----------
    params : pandas.DataFrame
        Rows of the store view ``test_params``; rejected tests are left out.
    against : str
        Column to map against: ``"level"`` (default) or any numeric column, e.g. an input position.

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
    others are left out with a note. See :func:`fit_trend` for the trend method.
    """
    frame = usable_tests(params, against)
    notes = []
    counts = frame["model"].value_counts()
    model = str(counts.index[0])
    if len(counts) > 1:
        notes.append(f"{int(counts.iloc[1:].sum())} test(s) with another model than '{model}' left out")
        frame = frame[frame["model"] == model]
    names = ("gain", "dead_time") if model == "integrating" else PARAMETERS
    trends = {}
    for name in names:
        value, sigma = parameter_values(frame, name)
        if np.isfinite(value).any():
            trends[name] = fit_trend(frame["_x"].to_numpy(float), value, sigma, name)
    x = frame["_x"].to_numpy(float)
    labels = cluster_levels(x)
    levels = tuple(float(np.mean(x[labels == k])) for k in range(labels.max() + 1))
    return OperatingMap(against=against, model=model, level_min=float(x.min()), level_max=float(x.max()),
                        levels=levels, trends=trends, n_tests=int(len(frame)), notes=tuple(notes))
