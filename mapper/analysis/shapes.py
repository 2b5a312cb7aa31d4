"""Trend shapes and the statistics of one weighted fit of a shape to the tests of one parameter.

This module owns the shapes a trend may take (polynomials in the level, the same in the logarithm of
the parameter, and piecewise linear through the level means), the between-test scatter estimated
from the pure error of repeats, and for each shape its weighted fit, lack-of-fit test, AICc and
significance. :mod:`mapper.analysis.trends` chooses among the fits and builds the band.

Notation: ``z`` is the level scaled to about -1..1, ``eta`` the fitted quantity (the parameter, or
the logarithm of its magnitude for log shapes), ``s`` the standard deviation of ``eta`` per test and
``s2`` the extra scatter between tests (a variance in the space of ``eta``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special
from scipy.optimize import brentq

from mapper.constants import Z95

# scipy.special's distribution functions are used instead of scipy.stats' objects: the same values
# (t quantile stdtrit, F tail fdtrc, chi-square tail chdtrc) at a hundredth of the call cost, which
# matters because trends are refitted once per test for the outlier and influence searches.

__all__ = ["Reference", "Shape", "ShapeFit", "candidate_shapes", "fit_shape", "inside_pooled", "pooled_levels",
           "pure_error_scatter", "reference_fit"]

PIECEWISE_MAX_LEVELS = 6  # piecewise linear through level means is offered when levels are few


@dataclass(frozen=True)
class Shape:
    """One trend shape.

    Attributes
    ----------
    name : str
        ``constant``, ``linear``, ``quadratic``, ``log_linear``, ``log_quadratic`` or
        ``piecewise_linear``.
    space : {"level", "log"}
        Whether the shape is fitted to the parameter or to the logarithm of its magnitude.
    degree : int
        Polynomial degree (``-1`` for piecewise linear).
    knots : tuple of float
        Scaled levels of the level means (piecewise linear only).
    sign : float
        Sign of the parameter (log shapes only).
    """

    name: str
    space: str
    degree: int
    knots: tuple = ()
    sign: float = 1.0

    @property
    def n_coefficients(self) -> int:
        return len(self.knots) if self.knots else self.degree + 1

    def design(self, z) -> np.ndarray:
        """Design matrix at scaled levels ``z`` (piecewise: hat functions, end segments extended)."""
        z = np.atleast_1d(np.asarray(z, dtype=float))
        if not self.knots:
            return np.vander(z, self.degree + 1, increasing=True)
        knots = np.asarray(self.knots)
        index = np.clip(np.searchsorted(knots, z) - 1, 0, knots.size - 2)
        left, right = knots[index], knots[index + 1]
        t = (z - left) / (right - left)
        basis = np.zeros((z.size, knots.size))
        rows = np.arange(z.size)
        basis[rows, index] = 1.0 - t
        basis[rows, index + 1] += t
        return basis

    def contrast(self) -> np.ndarray:
        """Rows whose zero means "no variation": the non-constant coefficients, or knot differences."""
        p = self.n_coefficients
        if self.knots:
            return np.diff(np.eye(p), axis=0)
        return np.eye(p)[1:]

    def to_space(self, value, sigma):
        """The parameter and its standard deviation in the space of this shape (log: delta method)."""
        if self.space == "log":
            magnitude = np.abs(value)
            return np.log(magnitude), sigma / magnitude
        return value, sigma

    def predict(self, z, coefficients, covariance):
        """Value and standard error of the trend at ``z``, in parameter units (log: delta method)."""
        design = self.design(z)
        eta = design @ np.asarray(coefficients, dtype=float)
        se = np.sqrt(np.einsum("ij,jk,ik->i", design, np.asarray(covariance, dtype=float), design).clip(min=0))
        if self.space == "log":
            value = self.sign * np.exp(eta)
            return value, np.abs(value) * se
        return eta, se


def candidate_shapes(value: np.ndarray, level_means_z: np.ndarray, n_tests: int) -> list[Shape]:
    """Shapes that the tests can support, simplest first.

    A shape needs no more coefficients than distinct levels and at least one residual degree of
    freedom; log shapes need values of one sign, none zero; piecewise linear needs three to
    ``PIECEWISE_MAX_LEVELS`` levels and a repeat somewhere.
    """
    n_levels = level_means_z.size
    shapes = [Shape("constant", "level", 0)]
    one_sign = bool(np.all(value > 0) or np.all(value < 0))
    sign = 1.0 if np.all(value > 0) else -1.0
    for degree, name in ((1, "linear"), (2, "quadratic")):
        if degree + 1 <= n_levels and n_tests - degree - 1 >= 1:
            shapes.append(Shape(name, "level", degree))
            if one_sign:
                shapes.append(Shape(f"log_{name}", "log", degree, sign=sign))
    if 3 <= n_levels <= PIECEWISE_MAX_LEVELS and n_tests > n_levels:
        shapes.append(Shape("piecewise_linear", "level", -1, knots=tuple(float(v) for v in level_means_z)))
    return shapes


def _weighted_solve(design, eta, variance):
    weight = 1.0 / variance
    normal = design.T @ (design * weight[:, None])
    try:
        covariance = np.linalg.inv(normal)
    except np.linalg.LinAlgError:
        covariance = np.linalg.pinv(normal)
    beta = covariance @ (design.T @ (weight * eta))
    residual = eta - design @ beta
    return beta, covariance, float(np.sum(weight * residual ** 2)), residual


def _root(chi_square, dof, scale) -> float:
    """Extra variance ``v >= 0`` with ``chi_square(v) = dof`` (0 when ``chi_square(0) <= dof``)."""
    if dof <= 0 or chi_square(0.0) <= dof:
        return 0.0
    upper = max(float(scale), 1e-300)
    while chi_square(upper) > dof and upper < 1e300:
        upper *= 4.0
    return float(brentq(lambda v: chi_square(v) - dof, 0.0, upper, xtol=1e-10 * upper + 1e-300))


def _paule_mandel(design, eta, s, dof) -> float:
    """Extra variance making the reduced chi-square of the weighted fit 1 (0 when already <= 1)."""
    return _root(lambda v: _weighted_solve(design, eta, s ** 2 + v)[2], dof, np.var(eta))


def _pure_chi_square(eta, variance, labels) -> float:
    """Weighted sum of squares of the tests about their weighted level means."""
    weight = 1.0 / variance
    means = np.bincount(labels, weight * eta) / np.bincount(labels, weight)
    return float(np.sum(weight * (eta - means[labels]) ** 2))


def level_indicator(labels: np.ndarray) -> np.ndarray:
    """Design matrix of one mean per level (the saturated model behind the pure error)."""
    return (labels[:, None] == np.arange(labels.max() + 1)[None, :]).astype(float)


def pure_error_scatter(eta, s, labels) -> tuple[float, int]:
    """Extra scatter between repeats and the pure-error degrees of freedom.

    The repeats at each level are compared with their weighted level mean; the extra variance ``s2``
    is the Paule-Mandel value that makes their reduced chi-square 1 (Paule & Mandel, 1982), 0 when the
    repeats already agree within their intervals. Degrees of freedom: tests minus levels.
    """
    dof = int(labels.size - (labels.max() + 1))
    if dof <= 0:
        return 0.0, 0
    return _root(lambda v: _pure_chi_square(eta, s ** 2 + v, labels), dof, np.var(eta)), dof


@dataclass(frozen=True)
class Reference:
    """The model shapes are judged against: level means (repeats) or, without repeats, the richest
    polynomial that leaves a residual degree of freedom. ``s2`` is the extra scatter it leaves."""

    s2: float
    dof: int
    n_coefficients: int
    labels: np.ndarray
    design: np.ndarray | None = None

    def chi_square(self, eta, variance) -> float:
        if self.design is None:
            return _pure_chi_square(eta, variance, self.labels)
        return _weighted_solve(self.design, eta, variance)[2]


def reference_fit(eta, s, labels, z) -> Reference | None:
    """The reference model in one space (see :class:`Reference`); None with fewer than three tests.

    Notes
    -----
    With repeats the reference is the level means and ``s2`` the pure-error scatter (Draper & Smith,
    1998, sec. 2.1). Without repeats there is no pure error; the richest polynomial (at most
    quadratic) that leaves a residual degree of freedom stands in for it, so ``s2`` is still
    estimated once, from a flexible model, and never from the misfit of the shape being judged.
    """
    n_levels = int(labels.max() + 1)
    if labels.size > n_levels:
        s2, dof = pure_error_scatter(eta, s, labels)
        return Reference(s2, dof, n_levels, labels)
    degree = min(2, n_levels - 1, labels.size - 2)
    if degree < 0 or labels.size < 3:
        return None
    design = np.vander(np.asarray(z, dtype=float), degree + 1, increasing=True)
    dof = labels.size - degree - 1
    return Reference(_paule_mandel(design, eta, s, dof), dof, degree + 1, labels, design)


@dataclass(frozen=True)
class ShapeFit:
    """One shape fitted to the tests of one parameter (see :func:`fit_shape`)."""

    shape: Shape
    coefficients: tuple
    covariance: tuple
    extra_variance: float
    dof: int
    chi_square: float
    lack_of_fit_p: float | None
    significance_p: float | None
    aicc: float
    quantile: float

    def predict(self, z):
        return self.shape.predict(z, self.coefficients, self.covariance)


def fit_shape(shape: Shape, z, value, sigma, labels, reference: Reference | None) -> ShapeFit:
    """Weighted fit of one shape with its lack-of-fit test, AICc and significance.

    Parameters
    ----------
    shape : Shape
    z, value, sigma : ndarray
        Scaled levels, parameter values and their standard deviations.
    labels : ndarray of int
        Level of each test (:func:`mapper.analysis.trends.cluster_levels`).
    reference : Reference or None
        The model the shape is judged against, in the shape's space (:func:`reference_fit`); None
        for fewer than three tests (no extra scatter, no lack-of-fit test).

    Notes
    -----
    Each test is weighted by ``1 / (s_i^2 + s2)``. ``s2`` comes from the reference model (with
    repeats, the pure error alone), so a shape that misses its tests cannot hide its misfit in the
    scatter; the shape is then judged by the lack-of-fit test of Draper & Smith (*Applied Regression
    Analysis*, 3rd ed., 1998, sec. 2.1): the weighted residual sum splits into pure error (tests
    about the reference) and lack of fit, ``F = (chi2_lof / (m - p)) / (chi2_pe / d)`` on
    ``(m - p, d)`` degrees of freedom for a reference of ``m`` coefficients (``m`` levels with
    repeats) and ``d`` residual degrees of freedom and a shape of ``p`` coefficients (a chi-square on
    ``m - p`` when the intervals alone explain the reference's residuals, ``s2 = 0``).
    AICc (Hurvich & Tsai, 1989) is taken on the likelihood of the parameter itself, so log shapes
    carry the Jacobian ``-sum(log|y|)`` and compare with the others. Significance is the Wald test of
    :meth:`Shape.contrast` (F with the degrees of freedom behind ``s2`` when ``s2`` was estimated,
    chi-square otherwise).
    """
    eta, s = shape.to_space(value, sigma)
    design = shape.design(z)
    n, p = eta.size, shape.n_coefficients
    dof = n - p
    # Fewer than three tests: no reference; the shape's own residuals are all there is.
    s2 = reference.s2 if reference is not None else _paule_mandel(design, eta, s, dof)
    pure_dof = reference.dof if reference is not None else 0
    variance = s ** 2 + s2
    beta, covariance, chi2, residual = _weighted_solve(design, eta, variance)
    scatter_dof = pure_dof if pure_dof > 0 else dof
    quantile = float(special.stdtrit(scatter_dof, 0.975)) if s2 > 0 and scatter_dof > 0 else Z95

    lack_of_fit_p = None
    if reference is not None and pure_dof > 0 and reference.n_coefficients - p > 0:
        lof_dof = reference.n_coefficients - p
        chi2_pure = reference.chi_square(eta, variance)
        lof = max(chi2 - chi2_pure, 0.0) / lof_dof
        if s2 > 0:
            lack_of_fit_p = float(special.fdtrc(lof_dof, pure_dof, lof / (chi2_pure / pure_dof)))
        else:
            lack_of_fit_p = float(special.chdtrc(lof_dof, lof * lof_dof))

    significance_p = None
    contrast = shape.contrast()
    if contrast.shape[0]:
        b = contrast @ beta
        wald = float(b @ np.linalg.pinv(contrast @ covariance @ contrast.T) @ b)
        q = contrast.shape[0]
        if s2 > 0 and scatter_dof > 0:
            significance_p = float(special.fdtrc(q, scatter_dof, wald / q))
        else:
            significance_p = float(special.chdtrc(q, wald))

    loglik = -0.5 * float(np.sum(np.log(2 * np.pi * variance) + residual ** 2 / variance))
    if shape.space == "log":
        loglik -= float(np.sum(eta))  # Jacobian of y -> log|y|: likelihoods of the parameter itself
    k = p + (1 if s2 > 0 else 0)
    aicc = -2 * loglik + 2 * k + (2 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else math.inf)
    return ShapeFit(shape=shape, coefficients=tuple(float(v) for v in beta),
                    covariance=tuple(tuple(float(v) for v in row) for row in covariance),
                    extra_variance=float(s2), dof=int(scatter_dof if s2 > 0 else dof), chi_square=chi2,
                    lack_of_fit_p=lack_of_fit_p, significance_p=significance_p, aicc=float(aicc),
                    quantile=quantile)


def pooled_levels(fit: ShapeFit, y, sigma, labels):
    """Weighted mean of each level's tests and its standard error, in the space of ``fit``.

    The weights carry the fit's extra scatter; the standard error is widened by the Birge ratio
    (Birge, 1932) where a level's own repeats scatter beyond that.
    """
    eta, s = fit.shape.to_space(y, sigma)
    weight = 1.0 / (s ** 2 + fit.extra_variance)
    total = np.bincount(labels, weight)
    mean = np.bincount(labels, weight * eta) / total
    count = np.bincount(labels)
    chi2 = np.bincount(labels, weight * (eta - mean[labels]) ** 2)
    birge = np.where(count > 1, chi2 / np.maximum(count - 1, 1), 1.0)
    return mean, np.sqrt(np.maximum(birge, 1.0) / total), count


def inside_pooled(fit: ShapeFit, z, y, sigma, labels) -> bool:
    """Whether the fitted shape stays inside every tested level's pooled interval, family-wise 95 %.

    A test of the largest standardised distance over the ``m`` levels (two-sided Bonferroni point
    at 5 %/m): it catches a shape that misses one level, which the F test of lack of fit, spread over
    all levels, can pass when repeats are few.
    """
    mean, se, _ = pooled_levels(fit, y, sigma, labels)
    at = np.bincount(labels, z) / np.bincount(labels)
    eta = fit.shape.design(at) @ np.asarray(fit.coefficients)
    limit = float(-special.ndtri(0.025 / mean.size))
    return bool(np.all(np.abs(eta - mean) <= limit * se * (1 + 1e-9) + 1e-12 * np.abs(mean)))
