"""Robust trends of one parameter against the operating level, with honest 95 % bands.

This module owns the trend of one parameter: the choice among the shapes of
:mod:`mapper.analysis.shapes` (those that pass the lack-of-fit test against the pure error of repeats,
then the simplest adequate one by AICc), the outliers against the trend (tests that disagree with
their neighbours beyond their uncertainty, left out and flagged), the significance of the variation,
the band, whether the tests could see a change of the size that matters, and the check that the map
stays inside the pooled interval of its own tests at every tested level. It knows nothing of the
store or of campaigns; :mod:`mapper.analysis.opmap` feeds it one parameter at a time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import special

from mapper.analysis.shapes import (
    Shape,
    ShapeFit,
    candidate_shapes,
    fit_shape,
    inside_pooled,
    pooled_levels,
    reference_fit,
)
from mapper.constants import RELEVANT_CHANGE_RATIO, Z95
from mapper.errors import DataError

TREND_SHAPES = ("constant", "linear", "quadratic", "log_linear", "log_quadratic", "piecewise_linear")
LABELS = {"gain": "gain", "time_constant": "time constant", "dead_time": "dead time",
          "gain_over_time_constant": "gain / time constant"}
AICC_SUPPORT = 2.0  # shapes within this AICc of the best count as equally supported
LACK_OF_FIT_LEVEL = 0.05  # a shape whose lack-of-fit p-value is below this misses its tests
OUTLIER_LEVEL = 0.05  # family-wise level of the outlier test over all tests of a trend
OUTLIER_MAX_FRACTION = 0.2  # never leave out more than this share of the tests
MIN_LEVELS_TO_JUDGE = 3  # fewer levels cannot show whether a parameter stays or moves (see _detectable_ratio)
OUTLIER_SCREEN = 20  # at most this many tests (largest residuals first) are refitted without themselves

TREND_FLAG_TEXT = {
    "map_outside_tested_interval": ("the map at a tested level lies outside the pooled interval of that "
                                    "level's own tests"),
    "shape_misfit": "no shape offered passes the lack-of-fit test; the best of them is used",
    "not_enough_tests": ("not enough tests or levels to tell whether the parameter changes by a factor "
                         "that matters for the controller"),
    "some_intervals_missing": "some tests have no interval; the median interval is used for them",
    "no_intervals": "no test has an interval; the scatter between tests sets the band",
    "band_unknown": "no interval and no repeat scatter: the band cannot be given",
}  # flags of a trend; flags of a test (outlier_against_trend) live in mapper.identification.flags


def cluster_levels(x, tolerance: float | None = None) -> np.ndarray:
    """Label tests whose levels lie within ``tolerance`` of their neighbour as one operating point.

    The default tolerance is the larger of 2 % of the tested span and 0.5 % of the largest level
    magnitude (levels taken from data are never exactly equal). Returns integer labels in order of level.
    """
    x = np.asarray(x, dtype=float)
    order = np.argsort(x)
    span = float(np.ptp(x)) if x.size else 0.0
    scale = float(np.max(np.abs(x))) if x.size else 0.0
    tol = max(0.02 * span, 0.005 * scale) if tolerance is None else float(tolerance)
    labels = np.empty(x.size, dtype=int)
    current, previous = 0, None
    for i in order:
        if previous is not None and x[i] - previous > tol:
            current += 1
        labels[i] = current
        previous = x[i]
    return labels


@dataclass(frozen=True)
class Outlier:
    """A test that disagrees with the trend of the other tests beyond its uncertainty.

    ``index`` is the test's position in the arrays given to :func:`fit_trend`; ``expected`` and
    ``expected_sd`` are what the other tests predict at its level; ``z`` the standardised distance.
    """

    index: int
    level: float
    value: float
    expected: float
    expected_sd: float
    z: float
    left_out: bool

    @property
    def flag(self) -> str:
        return "outlier_against_trend" if self.left_out else "outlier_against_trend_kept"


@dataclass(frozen=True)
class Trend:
    """Robust trend of one parameter against the operating level.

    Attributes
    ----------
    parameter, shape : str
    coefficients, covariance : tuple
        Of the chosen shape (:class:`mapper.analysis.shapes.Shape`, in ``z = (level - centre) / scale``).
    extra_scatter : float
        Standard deviation of scatter between tests beyond their own intervals (in the space of the
        shape: parameter units, or relative for log shapes).
    quantile : float
        Multiplier giving the 95 % band from the standard error (Student t when scatter is estimated).
    p_value : float or None
        Test of "no variation" on the chosen shape (None for a constant).
    lack_of_fit_p : float or None
        Lack-of-fit test of the chosen shape against the pure error (None without repeats).
    significant : bool
        Whether the parameter moves over the tested range beyond its uncertainty.
    aicc : dict
        AICc of every shape tried.
    constant, constant_half_width : float
        The constant fit and its 95 % half-width, used where the variation is not significant.
    alternatives : tuple
        ``(akaike_weight, coefficients, covariance, quantile)`` of every shape that passes the
        lack-of-fit test, for the band; ``alternative_shapes`` holds their shapes.
    outliers : tuple of Outlier
    level_checks : tuple of dict
        Per tested level: ``level, n_tests, value, pooled, pooled_lo, pooled_hi, inside``.
    detectable_ratio : float
        Largest change (max/min over the tested range) still inside the uncertainty when the variation
        is not significant (infinite from one level); ``enough_data`` is False while it exceeds the
        change that matters, and ``levels_to_add`` names levels that would settle it.
    """

    parameter: str
    shape: str
    coefficients: tuple
    covariance: tuple
    centre: float
    scale: float
    extra_scatter: float
    quantile: float
    level_min: float
    level_max: float
    n_tests: int
    n_levels: int
    p_value: float | None
    significant: bool
    aicc: dict
    constant: float
    constant_half_width: float
    flags: tuple = ()
    alternatives: tuple = ()
    alternative_shapes: tuple = ()
    shape_spec: Shape | None = None
    lack_of_fit_p: float | None = None
    outliers: tuple = ()
    level_checks: tuple = ()
    detectable_ratio: float = math.nan
    enough_data: bool = True
    levels_to_add: tuple = ()

    def evaluate(self, level, *, significant_only: bool = False):
        """Trend value and 95 % band at ``level`` (scalar or array), as ``(value, lo, hi)``."""
        x = np.atleast_1d(np.asarray(level, dtype=float))
        if significant_only and not self.significant:
            value = np.full(x.shape, self.constant)
            half = np.full(x.shape, self.constant_half_width)
        else:
            z = (x - self.centre) / self.scale
            shape = self.shape_spec or Shape(self.shape, "level", len(self.coefficients) - 1)
            value = shape.predict(z, self.coefficients, self.covariance)[0]
            half = np.zeros_like(value)
            # Shape uncertainty: Akaike-weighted sum over the adequate shapes of each shape's 95 %
            # half-width combined with its distance from the chosen trend (after Burnham & Anderson's
            # unconditional standard error, 2002).
            for (weight, coefficients, covariance, quantile), other_shape in zip(
                    self.alternatives, self.alternative_shapes):
                other, se = other_shape.predict(z, coefficients, covariance)
                half += weight * np.sqrt((quantile * se) ** 2 + (other - value) ** 2)
        if "band_unknown" in self.flags:
            half = np.full(x.shape, np.nan)
        if np.ndim(level) == 0:
            return float(value[0]), float(value[0] - half[0]), float(value[0] + half[0])
        return value, value - half, value + half

    def variation(self, points: int = 201) -> dict:
        """Min, max and ratio (max/min of magnitudes) of the trend over the tested range."""
        grid = np.linspace(self.level_min, self.level_max, points)
        values = self.evaluate(grid)[0] if self.level_max > self.level_min else np.array([self.constant])
        low, high = float(np.min(values)), float(np.max(values))
        if low > 0 or high < 0:
            magnitudes = np.abs(values)
            ratio = float(magnitudes.max() / magnitudes.min())
        else:
            ratio = math.nan
        return {"min": low, "max": high, "ratio": ratio,
                "at_low_end": float(values[0]), "at_high_end": float(values[-1])}


@dataclass(frozen=True)
class _Core:
    chosen: ShapeFit
    adequate: tuple
    fits: tuple
    labels: np.ndarray
    misfit: bool


def _relabel(labels: np.ndarray) -> np.ndarray:
    """Level labels renumbered 0.. after some tests were left out."""
    return np.unique(labels, return_inverse=True)[1].reshape(-1)


def _core_fit(z, y, sigma, labels) -> _Core:
    """Fit every candidate shape and choose; see :func:`fit_trend`."""
    labels = _relabel(labels)
    n_levels = int(labels.max() + 1)
    means = np.array([float(np.mean(z[labels == k])) for k in range(n_levels)])
    shapes = candidate_shapes(y, means, y.size)
    reference = {"level": reference_fit(y, sigma, labels, z)}
    if any(s.space == "log" for s in shapes):
        log_value, log_sigma = Shape("log", "log", 0).to_space(y, sigma)
        reference["log"] = reference_fit(log_value, log_sigma, labels, z)
    fits = [fit_shape(s, z, y, sigma, labels, reference[s.space]) for s in shapes]
    # Adequate: passes the lack-of-fit test and stays inside the tested levels' pooled intervals.
    adequate = [f for f in fits if (f.lack_of_fit_p is None or f.lack_of_fit_p >= LACK_OF_FIT_LEVEL)
                and (f.lack_of_fit_p is None or inside_pooled(f, z, y, sigma, labels))]
    misfit = not adequate
    if misfit:
        adequate = [max(fits, key=lambda f: f.lack_of_fit_p or 0.0)]
    best = min(f.aicc for f in adequate)
    ordered = sorted(adequate, key=lambda f: (f.shape.n_coefficients, f.aicc))
    chosen = ordered[0]
    if math.isfinite(best):
        chosen = next(f for f in ordered if f.aicc <= best + AICC_SUPPORT)
    return _Core(chosen, tuple(adequate), tuple(fits), labels, misfit)


def _predict_without(z, y, sigma, labels, leave_out, i) -> tuple[float, float, bool]:
    """What the tests not in ``leave_out`` predict at test ``i``: ``(value, sd, saturated)``.

    ``sd`` combines test ``i``'s own interval, the scatter between tests and the trend's standard
    error; ``saturated`` says the chosen shape passes through every level mean (no smoothness to judge
    a lone test by).
    """
    keep = ~leave_out
    core = _core_fit(z[keep], y[keep], sigma[keep], labels[keep])
    fit = core.chosen
    value, se = fit.predict(np.array([z[i]]))
    scatter = math.sqrt(fit.extra_variance) * (abs(float(value[0])) if fit.shape.space == "log" else 1.0)
    sd = math.sqrt(sigma[i] ** 2 + scatter ** 2 + float(se[0]) ** 2)
    saturated = fit.shape.n_coefficients >= int(_relabel(labels[keep]).max() + 1)
    return float(value[0]), sd, saturated


def _outlier_threshold(n: int, dof: int | None) -> float:
    """Two-sided Bonferroni point over ``n`` tests (Student t when the scatter was estimated)."""
    tail = OUTLIER_LEVEL / (2 * n)
    return float(special.stdtrit(dof, 1.0 - tail)) if dof else float(-special.ndtri(tail))


def _find_outliers(z, y, sigma, all_labels) -> list[Outlier]:
    """Backward deletion of tests that disagree with the others beyond their uncertainty."""
    active = np.arange(y.size)
    found: list[Outlier] = []
    limit = int(OUTLIER_MAX_FRACTION * y.size)
    while len(found) < limit and active.size >= 4:
        za, ya, sa = z[active], y[active], sigma[active]
        labels = _relabel(all_labels[active])
        if labels.max() < 1:
            break
        core = _core_fit(za, ya, sa, labels)
        dof = core.chosen.dof if core.chosen.extra_variance > 0 else None
        threshold = _outlier_threshold(active.size, dof)
        # Screen: deleting a test moves the trend away from it and its own interval is the smallest
        # part of its predictive spread, so a test far from the full trend in its own standard
        # deviations is the only kind that can clear the threshold once left out.
        value = core.chosen.predict(za)[0]
        rough = np.abs(ya - value) / sa
        candidates = np.flatnonzero(rough > 0.5 * threshold)
        if candidates.size > OUTLIER_SCREEN:
            candidates = np.argsort(-rough)[:OUTLIER_SCREEN]
        flagged, kept = [], []
        for candidate in candidates:
            i = int(candidate)
            alone = np.arange(active.size) == i
            expected, sd, saturated = _predict_without(za, ya, sa, labels, alone, i)
            score = (ya[i] - expected) / sd
            if abs(score) <= threshold:
                continue
            repeats = int(np.sum(labels == labels[i])) > 1
            if repeats:
                # Of repeats that disagree, the one farther from what the other levels predict there
                # is the outlier: its neighbours side with the other repeat.
                level = labels == labels[i]
                if labels.max() >= 2:
                    neighbours, spread, _ = _predict_without(za, ya, sa, labels, level, i)
                    distance = abs(ya[i] - neighbours) / spread
                else:
                    distance = abs(score)
                flagged.append((distance, i, score, expected, sd))
            elif not saturated and labels[i] not in (0, labels.max()):
                flagged.append((abs(score), i, score, expected, sd))
            elif labels[i] in (0, labels.max()):
                kept.append((abs(score), i, score, expected, sd))
        if not flagged:
            for _, i, score, expected, sd in sorted(kept, reverse=True)[:1]:
                found.append(Outlier(index=int(active[i]), level=float(za[i]), value=float(ya[i]),
                                     expected=expected, expected_sd=sd, z=float(score), left_out=False))
            break
        _, i, score, expected, sd = max(flagged)
        found.append(Outlier(index=int(active[i]), level=float(za[i]), value=float(ya[i]),
                             expected=expected, expected_sd=sd, z=float(score), left_out=True))
        active = np.delete(active, i)
    return found


def _detectable_ratio(z, y, sigma, labels) -> float:
    """Largest max/min change over the range still inside the 95 % uncertainty of a straight trend.

    Notes
    -----
    A straight line in the logarithm (in the parameter itself when values change sign) is fitted with
    the pure-error scatter; the upper 95 % bound of its slope, taken over the scaled range -1..1,
    gives the ratio. With fewer than ``MIN_LEVELS_TO_JUDGE`` levels the ratio is infinite: a straight
    line through two levels always fits, so the tests cannot say how the parameter moves between or
    beyond them.
    """
    if labels.max() < MIN_LEVELS_TO_JUDGE - 1 or y.size < 3:
        return math.inf  # a line through two levels always fits: nothing says how it moves between or beyond
    one_sign = bool(np.all(y > 0) or np.all(y < 0))
    shape = Shape("log_linear", "log", 1) if one_sign else Shape("linear", "level", 1)
    eta, s = shape.to_space(y, sigma)
    fit = fit_shape(shape, z, y, sigma, labels, reference_fit(eta, s, labels, z))
    slope = abs(fit.coefficients[1]) + fit.quantile * math.sqrt(max(fit.covariance[1][1], 0.0))
    if one_sign:
        return math.exp(2 * slope)
    centre = abs(fit.coefficients[0])
    return (centre + slope) / (centre - slope) if centre > slope else math.inf


def _levels_to_add(level_means: np.ndarray, has_repeats: bool) -> tuple:
    """Levels whose tests would settle whether the parameter moves."""
    if level_means.size == 1:
        return ()
    if level_means.size == 2:
        return (float(level_means[0]), float(level_means.mean()), float(level_means[1]))
    gaps = np.diff(level_means)
    widest = int(np.argmax(gaps))
    mid = float(level_means[widest] + gaps[widest] / 2)
    ends = (float(level_means[0]), float(level_means[-1]))
    return tuple(sorted(set(ends + (mid,)))) if has_repeats else ends + (mid,)


def _level_checks(trend_value, z, y, sigma, labels, fit: ShapeFit, centre, scale) -> list[dict]:
    """The map against the pooled interval of each tested level's own tests."""
    mean, se, count = pooled_levels(fit, y, sigma, labels)
    checks = []
    for k in range(mean.size):
        lo, hi = mean[k] - Z95 * se[k], mean[k] + Z95 * se[k]
        pooled = mean[k]
        if fit.shape.space == "log":
            pooled, lo, hi = (fit.shape.sign * math.exp(v) for v in (mean[k], lo, hi))
            lo, hi = min(lo, hi), max(lo, hi)
        level = float(np.mean(z[labels == k])) * scale + centre
        value = trend_value(level)
        tolerance = 1e-9 * max(abs(hi), abs(lo), 1e-300)
        checks.append({"level": level, "n_tests": int(count[k]), "value": float(value), "pooled": float(pooled),
                       "pooled_lo": float(lo), "pooled_hi": float(hi),
                       "inside": bool(lo - tolerance <= value <= hi + tolerance)})
    return checks


def fit_trend(x, y, sigma, parameter: str, *, robust: bool = True) -> Trend:
    """Choose and fit the simplest adequate trend of one parameter, robust to one disturbed test.

    Parameters
    ----------
    x, y, sigma : array_like
        Operating levels, parameter values and their standard deviations (NaN when unknown).
    parameter : str
    robust : bool
        Look for outliers against the trend and leave them out (default True).

    Returns
    -------
    Trend
        ``outliers[k].index`` refers to positions in ``x``.

    Notes
    -----
    Shapes: constant, straight and quadratic in the level, the same in the logarithm of the
    parameter (gain and lag often grow by a factor, not by a constant), and piecewise linear through
    the level means when levels are few (:mod:`mapper.analysis.shapes`). Each test is weighted by
    ``1 / (sigma_i^2 + s^2)``, ``s^2`` the extra scatter of repeats about their level means
    (Paule & Mandel, 1982), so the misfit of a shape cannot inflate it. A shape whose lack-of-fit test
    against that pure error fails at 5 % (Draper & Smith, 1998), or that leaves a tested level's
    pooled interval at a family-wise 95 %, is not used; of the others the simplest within 2 of the
    best AICc (Hurvich & Tsai, 1989; Burnham & Anderson, 2002) is chosen. Without repeats the richest
    polynomial leaving a residual degree of freedom stands in for the level means
    (:func:`mapper.analysis.shapes.reference_fit`).

    Outliers: each test is compared with the trend fitted to the other tests (externally studentised
    residual with the test's own interval, the others' scatter and the trend's standard error; Cook &
    Weisberg, 1982) against a two-sided Bonferroni point at 5 % over all tests. Of repeats beyond it,
    the one farther from what the other levels predict at its level is left out (its neighbours side
    with the other repeat); a lone test is left out only inside the range and where the trend is not
    saturated; the search repeats, at most for 20 % of the tests. A lone test at an end of the range
    is flagged but kept: there it cannot be told from curvature.

    The variation is significant when the Wald test of the chosen shape rejects "no variation" at 5 %.
    When it is not, the upper 95 % bound of a straight trend (in the logarithm) gives the largest
    change still hidden in the uncertainty; above ``RELEVANT_CHANGE_RATIO`` the trend is flagged
    ``not_enough_tests`` and names levels to add. The band is the Akaike-weighted 95 % confidence
    band over the adequate shapes (Burnham & Anderson's unconditional standard error, 2002).
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    positions = np.flatnonzero(np.isfinite(x) & np.isfinite(y))
    x, y, sigma = x[positions], y[positions], sigma[positions]
    if y.size == 0:
        raise DataError(f"no test has a usable {LABELS.get(parameter, parameter)}")
    flags = []
    good_sigma = np.isfinite(sigma) & (sigma > 0)
    if not good_sigma.all():
        if good_sigma.any():
            sigma = np.where(good_sigma, sigma, np.median(sigma[good_sigma]))
            flags.append("some_intervals_missing")
        else:
            sigma = np.zeros_like(y)
            flags.append("no_intervals")
    floor = 1e-9 * max(float(np.max(np.abs(y))), 1e-300)
    sigma = np.maximum(sigma, floor)

    centre = float(np.mean([x.min(), x.max()]))
    scale = float(x.max() - x.min()) / 2.0 or 1.0
    z = (x - centre) / scale
    all_labels = cluster_levels(x)
    outliers = _find_outliers(z, y, sigma, all_labels) if robust and "no_intervals" not in flags else []
    left_out = [o.index for o in outliers if o.left_out]
    keep = np.setdiff1d(np.arange(y.size), left_out)
    zk, yk, sk = z[keep], y[keep], sigma[keep]
    core = _core_fit(zk, yk, sk, all_labels[keep])
    chosen = core.chosen
    if core.misfit:
        flags.append("shape_misfit")
    constant = core.fits[0]

    finite = [f for f in core.adequate if math.isfinite(f.aicc)] or [chosen]
    best = min(f.aicc for f in finite)
    relative = np.array([math.exp(-0.5 * (f.aicc - best)) if math.isfinite(best) else 1.0 for f in finite])
    weights = relative / relative.sum()
    alternatives = tuple((float(w), f.coefficients, f.covariance, f.quantile) for w, f in zip(weights, finite))
    p_value = chosen.significance_p if chosen.shape.n_coefficients > 1 else None
    significant = bool(p_value is not None and p_value < 0.05)
    if "no_intervals" in flags and chosen.dof <= 0:
        flags.append("band_unknown")  # no interval and no repeat scatter to judge the uncertainty by
    labels = core.labels
    level_means = np.array([float(np.mean(zk[labels == k])) for k in range(labels.max() + 1)]) * scale + centre
    detectable = math.nan
    enough, to_add = True, ()
    if not significant:
        detectable = _detectable_ratio(zk, yk, sk, labels)
        if not detectable <= RELEVANT_CHANGE_RATIO:
            enough = False
            to_add = _levels_to_add(level_means, yk.size > level_means.size)
            flags.append("not_enough_tests")
    outliers = [Outlier(int(positions[o.index]), o.level * scale + centre, o.value, o.expected,
                        o.expected_sd, o.z, o.left_out) for o in outliers]
    trend = Trend(
        parameter=parameter, shape=chosen.shape.name, coefficients=chosen.coefficients,
        covariance=chosen.covariance, centre=centre, scale=scale,
        extra_scatter=math.sqrt(chosen.extra_variance), quantile=chosen.quantile,
        level_min=float(x.min()), level_max=float(x.max()), n_tests=int(yk.size),
        n_levels=int(labels.max() + 1), p_value=p_value, significant=significant,
        aicc={f.shape.name: f.aicc for f in core.fits},
        constant=float(constant.coefficients[0]),
        constant_half_width=float(math.sqrt(max(constant.covariance[0][0], 0.0))) * constant.quantile,
        flags=tuple(flags), alternatives=alternatives, alternative_shapes=tuple(f.shape for f in finite),
        shape_spec=chosen.shape, lack_of_fit_p=chosen.lack_of_fit_p, outliers=tuple(outliers),
        detectable_ratio=float(detectable), enough_data=enough, levels_to_add=to_add)
    checks = _level_checks(lambda level: trend.evaluate(level)[0], zk, yk, sk, labels, chosen, centre, scale)
    extra = ("map_outside_tested_interval",) if not all(c["inside"] for c in checks) else ()
    return replace(trend, level_checks=tuple(checks), flags=trend.flags + extra)
