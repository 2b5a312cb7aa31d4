"""Weighted trends of one parameter against the operating level, with honest 95 % bands.

This module owns the statistics behind the operating map: polynomial trends (constant, linear,
quadratic) weighted by each test's own uncertainty plus the extra scatter between tests, the choice
of the simplest adequate shape, the significance of the variation and the band. It knows nothing of
the store or of campaigns; :mod:`mapper.analysis.opmap` feeds it one parameter at a time.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.optimize import brentq

from mapper.constants import Z95
from mapper.errors import DataError

TREND_SHAPES = ("constant", "linear", "quadratic")
LABELS = {"gain": "gain", "time_constant": "time constant", "dead_time": "dead time",
          "gain_over_time_constant": "gain / time constant"}
AICC_SUPPORT = 2.0  # shapes within this AICc of the best count as equally supported


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
class Trend:
    """Weighted polynomial trend of one parameter against the operating level.

    Attributes
    ----------
    parameter, shape : str
    coefficients : tuple of float
        Polynomial in ``z = (level - centre) / scale``, lowest power first.
    covariance : tuple of tuple of float
        Covariance of the coefficients (extra scatter included).
    extra_scatter : float
        Standard deviation of scatter between tests beyond their own intervals.
    quantile : float
        Multiplier giving the 95 % band from the standard error (Student t when scatter is estimated).
    p_value : float or None
        Test of the non-constant terms (None for a constant).
    significant : bool
        Whether the parameter moves over the tested range beyond its uncertainty.
    aicc : dict
        AICc of every shape tried.
    constant, constant_half_width : float
        The constant (weighted mean) fit and its 95 % half-width, used where the variation is not
        significant.
    alternatives : tuple
        ``(akaike_weight, coefficients, covariance, quantile)`` of every shape tried, for the band.
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

    def evaluate(self, level, *, significant_only: bool = False):
        """Trend value and 95 % band at ``level`` (scalar or array), as ``(value, lo, hi)``."""
        x = np.atleast_1d(np.asarray(level, dtype=float))
        if significant_only and not self.significant:
            value = np.full(x.shape, self.constant)
            half = np.full(x.shape, self.constant_half_width)
        else:
            z = (x - self.centre) / self.scale
            value = self._shape_value(z, self.coefficients, self.covariance)[0]
            half = np.zeros_like(value)
            # Shape uncertainty: Akaike-weighted sum over the shapes tried of each shape's 95 %
            # half-width combined with its distance from the chosen trend (after Burnham & Anderson's
            # unconditional standard error, 2002).
            for weight, coefficients, covariance, quantile in self.alternatives:
                other, se = self._shape_value(z, coefficients, covariance)
                half += weight * np.sqrt((quantile * se) ** 2 + (other - value) ** 2)
        if "band_unknown" in self.flags:
            half = np.full(x.shape, np.nan)
        if np.ndim(level) == 0:
            return float(value[0]), float(value[0] - half[0]), float(value[0] + half[0])
        return value, value - half, value + half

    @staticmethod
    def _shape_value(z, coefficients, covariance):
        design = np.vander(z, len(coefficients), increasing=True)
        value = design @ np.asarray(coefficients)
        se = np.sqrt(np.einsum("ij,jk,ik->i", design, np.asarray(covariance), design).clip(min=0))
        return value, se

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


def _fit_shape(z, y, sigma, degree):
    """Weighted fit with Paule-Mandel extra scatter; returns dict with beta, cov, s2, aicc, dof."""
    n = y.size
    design = np.vander(z, degree + 1, increasing=True)
    dof = n - (degree + 1)

    def solve(s2):
        weight = 1.0 / (sigma ** 2 + s2)
        a = design.T @ (design * weight[:, None])
        cov = np.linalg.pinv(a)
        beta = cov @ (design.T @ (weight * y))
        resid = y - design @ beta
        return beta, cov, float(np.sum(weight * resid ** 2)), resid

    s2 = 0.0
    beta, cov, chi2, resid = solve(0.0)
    if dof > 0 and chi2 > dof:
        upper = max(float(np.var(y)), 1e-300)
        while solve(upper)[2] > dof and upper < 1e300:
            upper *= 4.0
        s2 = brentq(lambda v: solve(v)[2] - dof, 0.0, upper, xtol=1e-14 * upper + 1e-300)
        beta, cov, chi2, resid = solve(s2)
    variance = sigma ** 2 + s2
    loglik = -0.5 * float(np.sum(np.log(2 * np.pi * variance) + resid ** 2 / variance))
    k = degree + 1 + (1 if s2 > 0 else 0)  # coefficients, plus the extra scatter when it is used
    aicc = -2 * loglik + 2 * k + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf)
    return {"beta": beta, "cov": cov, "s2": s2, "aicc": aicc, "dof": dof, "degree": degree}


def fit_trend(x, y, sigma, parameter: str) -> Trend:
    """Choose and fit the simplest adequate trend of one parameter.

    Parameters
    ----------
    x, y, sigma : array_like
        Operating levels, parameter values and their standard deviations (NaN when unknown).
    parameter : str

    Returns
    -------
    Trend

    Notes
    -----
    Each test is weighted by ``1 / (sigma_i^2 + s^2)``, where ``s^2`` is the extra scatter between
    tests beyond their own intervals, estimated by the Paule-Mandel method (Paule & Mandel, 1982:
    the reduced chi-square of the weighted fit is 1; ``s^2 = 0`` when the scatter is already inside
    the intervals). Constant, linear and quadratic shapes are compared by AICc (Hurvich & Tsai,
    1989) on that Gaussian likelihood; the simplest shape within 2 of the best AICc is chosen
    (Burnham & Anderson, 2002); the extra-scatter variance counts as a parameter when it is used
    (``s^2 > 0``). A shape needs more distinct levels than coefficients and enough tests for AICc to
    be finite. The variation is significant when a Wald test (F with the residual
    degrees of freedom when ``s^2`` is estimated, chi-square otherwise) rejects "all non-constant
    coefficients are zero" at the 5 % level. The band is the 95 % confidence band of the trend.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    keep = np.isfinite(x) & np.isfinite(y)
    x, y, sigma = x[keep], y[keep], sigma[keep]
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
    n_levels = int(cluster_levels(x).max() + 1)
    fits = []
    for degree in range(3):
        if degree >= n_levels or (degree > 0 and y.size - degree - 1 < 1):
            break
        fits.append(_fit_shape(z, y, sigma, degree))

    def quantile(fit):
        return float(stats.t.ppf(0.975, fit["dof"])) if fit["s2"] > 0 and fit["dof"] > 0 else Z95

    best = min(f["aicc"] for f in fits)
    chosen = fits[0]
    if math.isfinite(best):
        chosen = next(f for f in fits if f["aicc"] <= best + AICC_SUPPORT)
    constant = fits[0]

    finite = [f for f in fits if math.isfinite(f["aicc"])] or [chosen]
    relative = np.array([math.exp(-0.5 * (f["aicc"] - best)) if math.isfinite(best) else 1.0 for f in finite])
    alternatives = tuple(
        (float(w), tuple(float(v) for v in f["beta"]), tuple(tuple(float(v) for v in row) for row in f["cov"]),
         quantile(f))
        for w, f in zip(relative / relative.sum(), finite))

    p_value = None
    if chosen["degree"] > 0:
        b = chosen["beta"][1:]
        c = chosen["cov"][1:, 1:]
        wald = float(b @ np.linalg.pinv(c) @ b)
        q = b.size
        if chosen["s2"] > 0 and chosen["dof"] > 0:
            p_value = float(stats.f.sf(wald / q, q, chosen["dof"]))
        else:
            p_value = float(stats.chi2.sf(wald, q))
    if "no_intervals" in flags and chosen["dof"] <= 0:
        flags.append("band_unknown")  # no interval and no repeat scatter to judge the uncertainty by
    return Trend(
        parameter=parameter, shape=TREND_SHAPES[chosen["degree"]],
        coefficients=tuple(float(v) for v in chosen["beta"]),
        covariance=tuple(tuple(float(v) for v in row) for row in chosen["cov"]),
        centre=centre, scale=scale, extra_scatter=math.sqrt(chosen["s2"]), quantile=quantile(chosen),
        level_min=float(x.min()), level_max=float(x.max()), n_tests=int(y.size), n_levels=n_levels,
        p_value=p_value, significant=bool(p_value is not None and p_value < 0.05),
        aicc={TREND_SHAPES[f["degree"]]: float(f["aicc"]) for f in fits},
        constant=float(constant["beta"][0]),
        constant_half_width=float(math.sqrt(max(constant["cov"][0, 0], 0.0))) * quantile(constant),
        flags=tuple(flags), alternatives=alternatives,
    )
