"""Uncertainty of identified parameters: disturbance model, covariance, Cramér-Rao.

This module owns the covariance of a least-squares fit: from the Jacobian at the optimum
and a noise model fitted to the residuals (white noise plus a slowly wandering, first-order
correlated part, see :func:`disturbance_covariance`), and the Cramér-Rao bound that an
efficient estimator reaches. It knows the models only through their sensitivities.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import fft as sp_fft

from mapper.constants import Z95
from mapper.identification.models import first_order_filter, fopdt_sensitivities

__all__ = [
    "DisturbanceCovariance",
    "disturbance_covariance",
    "residual_autocorrelation",
    "sandwich_covariance",
    "t_quantile",
    "cramer_rao_sd",
]

MAX_AUTOCORRELATION = 0.98


def residual_autocorrelation(residuals: np.ndarray, n_parameters: int = 0) -> float:
    """Lag-one autocorrelation of residuals, bias-corrected and clipped to ``[0, 0.98]``.

    Notes
    -----
    The sample estimate is biased towards zero by about ``(1 + 3 phi)/n`` when the mean
    is estimated (Marriott & Pope, 1954); the correction, plus one sample per extra
    fitted parameter, is added back. Negative values are set to zero so intervals are
    never narrowed below the white-noise ones.
    """
    r = np.asarray(residuals, dtype=float)
    n = r.size
    r = r - r.mean()
    denom = float(np.dot(r, r))
    if n < 3 or denom <= 0:
        return 0.0
    phi = float(np.dot(r[1:], r[:-1]) / denom)
    if phi > 0:
        phi += (1.0 + 3.0 * phi + max(n_parameters - 1, 0)) / n
    return min(max(phi, 0.0), MAX_AUTOCORRELATION)


def t_quantile(dof: float, z: float = Z95) -> float:
    """Two-sided Student-t point for ``dof`` degrees of freedom (Cornish-Fisher series).

    Notes
    -----
    Expansion of the t quantile in powers of ``1/dof`` around the normal point
    (Abramowitz & Stegun, 1964, 26.7.5); within 0.2 % of the exact value for
    ``dof >= 5``.
    """
    v = max(float(dof), 3.0)
    return (
        z
        + (z**3 + z) / (4 * v)
        + (5 * z**5 + 16 * z**3 + 3 * z) / (96 * v**2)
        + (3 * z**7 + 19 * z**5 + 17 * z**3 - 15 * z) / (384 * v**3)
    )


def _ar1_times(x: np.ndarray, phi: float, axis: int = 0) -> np.ndarray:
    """``R @ x`` for the AR(1) correlation matrix ``R[i, j] = phi**|i-j|`` along ``axis``."""
    if phi == 0.0:
        return x
    x = np.moveaxis(x, axis, -1)
    fwd = first_order_filter(x, phi)
    bwd = first_order_filter(x[..., ::-1], phi)[..., ::-1]
    return np.moveaxis(fwd + bwd - x, -1, axis)


def _pseudo_inverse(a: np.ndarray) -> np.ndarray:
    """Moore-Penrose inverse of a symmetric matrix by its eigen-decomposition.

    Eigenvalues below ``1e-15`` of the largest are dropped, as ``numpy.linalg.pinv``
    does, at a fraction of its cost on these small matrices.
    """
    w, v = np.linalg.eigh(a)
    cut = 1e-15 * max(float(np.max(np.abs(w))), 0.0)
    keep = np.abs(w) > cut
    inv_w = np.zeros_like(w)
    inv_w[keep] = 1.0 / w[keep]
    return (v * inv_w) @ v.T


def sandwich_covariance(
    jacobian: np.ndarray, residuals: np.ndarray
) -> tuple[np.ndarray, float, float]:
    """Covariance of least-squares estimates, honest under AR(1) residuals.

    Parameters
    ----------
    jacobian : ndarray, shape (n, p)
        Derivatives of the model output with respect to the parameters at the optimum.
    residuals : ndarray, shape (n,)
        Output minus model at the optimum.

    Returns
    -------
    covariance : ndarray, shape (p, p)
    phi : float
        Lag-one autocorrelation used (0 for white residuals).
    dof : float
        Effective degrees of freedom ``n (1 - phi)/(1 + phi) - p`` for a t quantile.

    Notes
    -----
    With white noise this is the usual ``s^2 (J'J)^-1`` (Seber & Wild, *Nonlinear
    Regression*, 1989). When the residuals are autocorrelated the ordinary
    least-squares estimate stays unbiased but its covariance is the sandwich
    ``(J'J)^-1 J' S J (J'J)^-1`` with ``S`` the noise covariance (White, 1980; Newey &
    West, 1987). Here ``S = s^2 R`` with ``R[i, j] = phi^|i-j|`` (AR(1)), ``phi`` from
    the residuals, and ``s^2 = RSS / (n - tr((J'J)^-1 J'RJ))``, which is unbiased
    under that noise model (residuals of a fit with correlated noise are smaller than
    the noise). For slowly varying sensitivities the sandwich reduces to the classic
    widening factor ``(1 + phi)/(1 - phi)``.
    """
    J = np.asarray(jacobian, dtype=float)
    r = np.asarray(residuals, dtype=float)
    n, p = J.shape
    phi = residual_autocorrelation(r, p)
    rows = np.array(J.T, order="C")  # a copy (the caller's Jacobian stays); one row per parameter
    # scale rows for conditioning
    scale = np.sqrt(np.einsum("ij,ij->i", rows, rows))
    scale[scale == 0] = 1.0
    rows /= scale[:, None]
    gram = rows @ rows.T
    bread = _pseudo_inverse(gram)
    meat = rows @ _ar1_times(rows, phi, axis=1).T if phi > 0.0 else gram
    used = float(np.trace(bread @ meat))
    s2 = float(np.dot(r, r)) / max(n - used, 1.0)
    cov = s2 * bread @ meat @ bread
    cov = cov / np.outer(scale, scale)
    dof = max(n * (1.0 - phi) / (1.0 + phi) - p, 1.0)
    return 0.5 * (cov + cov.T), phi, dof


def cramer_rao_sd(
    t: np.ndarray,
    u: np.ndarray,
    gain: float,
    time_constant: float,
    dead_time: float,
    noise_sd: float,
    *,
    offset_free: bool = True,
    autocorrelation: float = 0.0,
    u0: float | None = None,
) -> dict[str, float]:
    """Cramér-Rao lower bound on the standard deviations of K, tau and theta.

    Parameters
    ----------
    t, u : ndarray
        Sample times (uniform, s) and input of the test.
    gain, time_constant, dead_time : float
        True parameters (K, tau s, theta s).
    noise_sd : float
        Standard deviation of the additive Gaussian output noise (marginal).
    offset_free : bool, default True
        Also estimate the output offset (a nuisance parameter).
    autocorrelation : float, default 0.0
        AR(1) coefficient phi of the noise; 0 for white noise.
    u0 : float, optional
        Input at rest; default ``u[0]``.

    Returns
    -------
    dict
        ``{"gain": sd, "time_constant": sd, "dead_time": sd}``.

    Notes
    -----
    Fisher information ``J' S^-1 J`` of the sampled FOPDT response under Gaussian
    noise (Cramér, 1946; Rao, 1945); for white noise ``S^-1 = I / sigma^2``. For AR(1)
    noise ``S^-1/2`` is the prewhitening filter ``e_k = (x_k - phi x_{k-1}) / s_e``
    with the first sample scaled by ``sqrt(1 - phi^2)`` (Box & Jenkins, 1970).
    """
    t = np.asarray(t, dtype=float)
    period = float(np.median(np.diff(t)))
    S = fopdt_sensitivities(u, period, gain, time_constant, dead_time, u0=u0)
    J = np.column_stack([np.ones_like(t), S]) if offset_free else S
    phi = float(autocorrelation)
    innovation_sd = noise_sd * np.sqrt(1.0 - phi**2)
    W = J.copy()
    W[1:] = J[1:] - phi * J[:-1]
    W[0] = J[0] * np.sqrt(1.0 - phi**2)
    W /= innovation_sd
    cov = np.linalg.inv(W.T @ W)
    sd = np.sqrt(np.diag(cov))[-3:]
    return {"gain": float(sd[0]), "time_constant": float(sd[1]), "dead_time": float(sd[2])}


# --- noise model with a slow, correlated part ---------------------------------------------

CORRELATION_TIME_POINTS = 8  # grid of correlation times, log-spaced from 1 sample to 10 records
CORRELATED_SHARES = (0.02, 0.1, 0.3, 0.6, 0.9, 0.98, 1.0)  # share of the noise variance
MIN_CORRELATED_DOF = 6.0  # fewest effective samples credited to the correlated part


@dataclass(frozen=True)
class DisturbanceCovariance:
    """Covariance of least-squares estimates under the fitted noise model.

    Attributes
    ----------
    covariance : ndarray, shape (p, p)
        Covariance of the parameters in the Jacobian's column order.
    quantiles : ndarray, shape (p,)
        Two-sided 95 % Student-t point for each parameter (effective degrees of freedom).
    autocorrelation : float
        Lag-one autocorrelation of the fitted noise model.
    white_sd, correlated_sd : float
        Standard deviations of the white and of the correlated part of the noise (most
        likely model).
    correlation_samples : float
        Correlation time of the correlated part in samples (most likely model; 0 when the
        noise is white).
    """

    covariance: np.ndarray
    quantiles: np.ndarray
    autocorrelation: float
    white_sd: float
    correlated_sd: float
    correlation_samples: float


def _grid_likelihood_terms(
    z: np.ndarray, poles: np.ndarray, shares: tuple[float, ...]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``z' H^-1 z`` and ``log det H`` for ``H = (1 - w) I + w R`` over a grid, and ``z' R z``.

    Parameters
    ----------
    z : ndarray, shape (n, m)
        Columns to form the quadratic forms of.
    poles : ndarray, shape (J,)
        Lag-one coefficients ``a`` of the correlated part (``R[i, j] = a^|i-j|``), each in
        (0, 1).
    shares : tuple of float
        Shares ``w`` of the correlated part, each in [0, 1], used with every pole.

    Returns
    -------
    grams : ndarray, shape (J, S, m, m)
        ``z' H^-1 z`` for every pole and share.
    log_dets : ndarray, shape (J, S)
        ``log det H``; NaN where the rank-two correction (below) is not positive.
    correlated : ndarray, shape (J, m, m)
        ``z' R z`` for every pole.

    Notes
    -----
    ``H = R B / (1 - a^2)`` with ``B = (1 - w) Q + (1 - a^2) w I`` and
    ``Q = (1 - a^2) R^-1`` tridiagonal, so ``H^-1 z = B^-1 Q z`` and
    ``log det H = log det B - log(1 - a^2)``. ``Q`` is the tridiagonal Toeplitz matrix
    ``(1 + a^2, -a)`` less ``a^2`` in its two corners; the Toeplitz part is diagonal in the
    orthonormal sine basis (type-I discrete sine transform; eigenvalues
    ``1 + a^2 - 2 a cos(pi k / (n + 1))``, a textbook result for tridiagonal Toeplitz
    matrices), and the corners are a rank-two correction taken by the Woodbury identity
    and the matrix determinant lemma. One transform of ``z`` then serves every grid point:
    each costs weighted sums over ``n`` instead of a factorisation. ``z' R z`` is
    ``(1 - a^2) z' Q^-1 z``, the ``w = 0`` case of the same algebra.
    """
    n, m = z.shape
    poles = np.asarray(poles, dtype=float)
    w = np.asarray(shares, dtype=float)
    J, S = poles.size, w.size
    theta = np.pi * np.arange(1, n + 1) / (n + 1)
    basis = np.empty((n, m + 2))
    basis[:, :m] = sp_fft.dst(z, type=1, axis=0, norm="ortho")
    edge = math.sqrt(2.0 / (n + 1)) * np.sin(theta)
    basis[:, m] = edge  # the first unit vector in the sine basis
    basis[:, m + 1] = edge * np.where(np.arange(n) % 2, -1.0, 1.0)  # the last one
    a2 = (poles * poles)[:, None]
    cos = np.cos(theta)
    # one weighted sum per grid point: mu / lam = (1 - c w / lam) / (1 - w) turns the
    # mu-weighted sums into unweighted ones less 1/lam-weighted ones, except at w = 1
    # (lam = c), where the mu-weighted sum is taken itself. Pole by pole, so the arrays
    # stay small enough to be reused by the allocator rather than mapped afresh each call
    # (fresh pages cost more than the arithmetic).
    zero = np.flatnonzero(w == 0.0)
    rows, cols = np.triu_indices(m + 2)
    products = basis[:, rows] * basis[:, cols]
    k = S + 1 + (0 if zero.size else 1)  # 1/lam per share, mu, and 1/mu at rest if no w = 0
    sums = np.empty((J, k, rows.size))
    log_lam = np.empty((J, S))
    weights = np.empty((k, n))
    for j, a in enumerate(poles.tolist()):
        mu = (1.0 + a * a) - 2.0 * a * cos  # eigenvalues of the Toeplitz part
        lam = np.multiply.outer(1.0 - w, mu)
        lam += ((1.0 - a * a) * w)[:, None]
        with np.errstate(invalid="ignore", divide="ignore"):
            np.log(lam).sum(axis=1, out=log_lam[j])
        np.divide(1.0, lam, out=weights[:S])
        weights[S] = mu
        if not zero.size:
            np.divide(1.0, mu, out=weights[S + 1])
        np.matmul(weights, products, out=sums[j])
    full = np.empty((J, k, m + 2, m + 2))
    full[:, :, rows, cols] = sums
    full[:, :, cols, rows] = sums
    plain, by_mu = full[:, :S], full[:, S]
    unweighted = basis[:, :m].T @ basis  # z'z and z'e: the transform is orthonormal
    cw = (1.0 - a2) * w[None, :]  # (J, S)
    whole = w[None, :] >= 1.0
    spare = np.where(whole, 1.0, 1.0 - w[None, :])[..., None, None]
    scaled_zz = (unweighted[:, :m] - cw[..., None, None] * plain[..., :m, :m]) / spare
    scaled_ze = (unweighted[:, m:] - cw[..., None, None] * plain[..., :m, m:]) / spare
    at_one = by_mu[:, None, :m, :] / (1.0 - a2)[:, :, None, None]  # mu-weighted over lam = c
    scaled_zz = np.where(whole[..., None, None], at_one[..., :m], scaled_zz)
    scaled_ze = np.where(whole[..., None, None], at_one[..., m:], scaled_ze)
    at_rest = plain[:, int(zero[0])] if zero.size else full[:, S + 1]
    P, C = plain[..., :m, m:], plain[..., m:, m:]  # z' L^-1 e and e' L^-1 e
    gamma = (1.0 - w)[None, :] * a2  # (J, S): weight of the corner correction
    N = np.eye(2) - gamma[..., None, None] * C
    ends = z[[0, -1], :]  # e' z
    a2_ = a2[:, :, None, None]
    # z' B^-1 Q z, with Q z = (Toeplitz part) z - a^2 e e' z
    right = np.swapaxes(scaled_ze, -1, -2) - a2_ * (C @ ends)
    grams = scaled_zz - a2_ * (P @ ends) + gamma[..., None, None] * (P @ np.linalg.solve(N, right))
    det_n = N[..., 0, 0] * N[..., 1, 1] - N[..., 0, 1] * N[..., 1, 0]
    with np.errstate(invalid="ignore", divide="ignore"):
        log_dets = log_lam + np.log(det_n) - np.log1p(-a2)
    # z' Q^-1 z at rest (w = 0, so L = the Toeplitz eigenvalues and the correction is a^2)
    P0, C0 = at_rest[:, :m, m:], at_rest[:, m:, m:]
    N0 = np.eye(2) - a2[:, :, None] * C0
    inverse_q = at_rest[:, :m, :m] + a2[:, :, None] * (P0 @ np.linalg.solve(N0, np.swapaxes(P0, -1, -2)))
    correlated = (1.0 - a2)[:, :, None] * inverse_q
    return grams, log_dets, correlated


def disturbance_covariance(jacobian: np.ndarray, residuals: np.ndarray) -> DisturbanceCovariance:
    """Covariance of output-error estimates with a slow disturbance modelled, not assumed away.

    Parameters
    ----------
    jacobian : ndarray, shape (n, p)
        Derivatives of the model output with respect to the parameters at the optimum;
        one column must be the constant offset (any position).
    residuals : ndarray, shape (n,)
        Output minus model at the optimum.

    Returns
    -------
    DisturbanceCovariance

    Notes
    -----
    The noise is modelled as white noise plus a first-order autoregressive part,
    ``S = s^2 ((1 - w) I + w R)``, ``R[i, j] = a^|i-j|``, ``a = exp(-1/c)``: a slow wander
    of correlation time ``c`` samples (a random walk is the limit of long ``c``) on top of
    measurement noise; ``w = 1`` is plain AR(1) noise. Wander that the offset, gain and
    time constant soak up leaves small residuals, so the noise parameters are judged by
    restricted maximum likelihood (REML; Patterson & Thompson, 1971; Harville, 1977),
    which accounts for what the fitted parameters absorb, with ``s^2`` profiled out.
    ``R^-1`` is tridiagonal and its Toeplitz part diagonal in the sine basis, so one sine
    transform serves every likelihood (:func:`_grid_likelihood_terms`).

    One record seldom settles the size of a slow wander, so no single noise model is
    trusted: the covariance is averaged over a grid of ``(c, w)`` (c log-spaced from
    1 sample to 10 records, ``w`` from 0 to 1, prior uniform over ``w`` and log-uniform
    over ``c``) with weights proportional to the restricted likelihood (Bayesian model
    averaging; Hoeting, Madigan, Raftery & Volinsky, 1999). For each noise model the
    covariance of the least-squares estimate is the sandwich ``(J'J)^-1 J'SJ (J'J)^-1``
    (White, 1980). The t point uses Satterthwaite's (1946) effective degrees of freedom,
    crediting the correlated part with the effective number of independent samples
    ``n (1 - a)/(1 + a)`` (Bayley & Hammersley, 1946), at least six, and the white part
    with ``n - p``.
    """
    J = np.asarray(jacobian, dtype=float)
    r = np.asarray(residuals, dtype=float)
    n, p = J.shape
    rows = np.array(J.T, order="C")  # a copy: the caller's Jacobian stays as given
    scale = np.sqrt(np.einsum("ij,ij->i", rows, rows))
    scale[scale == 0] = 1.0
    rows /= scale[:, None]
    gram = rows @ rows.T
    bread = _pseudo_inverse(gram)
    unscale = 1.0 / np.outer(scale, scale)
    white_dof = float(max(n - p, 1))
    sign, logdet_gram = np.linalg.slogdet(gram)
    if n < p + 4 or sign <= 0:
        s2 = float(r @ r) / white_dof
        cov = s2 * bread * unscale
        return DisturbanceCovariance(
            0.5 * (cov + cov.T), np.full(p, t_quantile(white_dof)), 0.0, math.sqrt(s2), 0.0, 0.0
        )
    z = np.column_stack([rows.T, r])
    correlations = np.geomspace(1.0, 10.0 * n, CORRELATION_TIME_POINTS)
    poles = np.exp(-1.0 / correlations)
    shares = (0.0, *CORRELATED_SHARES)
    grams_grid, log_dets_grid, correlated_grid = _grid_likelihood_terms(z, poles, shares)
    # the white model (w = 0) is the same for every correlation time: keep it once, with
    # the prior weight of them all (prior uniform over w)
    keep = np.ones((poles.size, len(shares)), dtype=bool)
    keep[1:, 0] = False
    j_grid, k_grid = np.nonzero(keep)
    w_grid = np.asarray(shares)[k_grid]
    prior_grid = np.where(w_grid == 0.0, float(CORRELATION_TIME_POINTS), 1.0)
    grams, log_dets = grams_grid[keep], log_dets_grid[keep]
    correlated_stack = bread @ correlated_grid[:, :p, :p] @ bread  # (correlation times, p, p)
    finite = np.isfinite(log_dets) & np.all(np.isfinite(grams), axis=(1, 2))
    if not finite.any():
        return sandwich_covariance_result(J, r)
    g = np.where(finite[:, None, None], grams, np.eye(p + 1))  # unusable ones are dropped below
    sign, log_det_a = np.linalg.slogdet(g[:, :p, :p])
    solved = np.linalg.solve(g[:, :p, :p], g[:, :p, p:])[:, :, 0]
    quadratic = g[:, p, p] - np.einsum("ki,ki->k", g[:, :p, p], solved)
    usable = finite & (sign > 0) & (quadratic > 0)
    s2_all = np.where(usable, quadratic, 1.0) / white_dof
    loglik_all = -0.5 * (np.where(finite, log_dets, 0.0) + log_det_a - logdet_gram + white_dof * np.log(s2_all))
    if not usable.any():
        return sandwich_covariance_result(J, r)
    prior, w_k, j_k = prior_grid[usable], w_grid[usable], j_grid[usable]
    a_k = poles[j_k]
    s2_k, loglik_k = s2_all[usable], loglik_all[usable]
    weight = prior * np.exp(loglik_k - loglik_k.max())
    weight /= weight.sum()
    white_part = (s2_k * (1.0 - w_k))[:, None] * np.diag(bread)[None, :]
    correlated_part = (s2_k * w_k)[:, None] * np.einsum("jii->ji", correlated_stack)[j_k]
    variance = white_part + correlated_part
    correlated_dof = np.maximum(n * (1.0 - a_k) / (1.0 + a_k), MIN_CORRELATED_DOF)
    per_dof = white_part**2 / white_dof + correlated_part**2 / correlated_dof[:, None]
    mean_v2, mean_v2_dof = weight @ variance**2, weight @ per_dof
    dof = np.divide(mean_v2, mean_v2_dof, out=np.full(p, white_dof), where=mean_v2_dof > 0)
    per_correlation = np.bincount(j_k, weights=weight * s2_k * w_k, minlength=poles.size)
    cov = float(weight @ (s2_k * (1.0 - w_k))) * bread + np.einsum("j,jkl->kl", per_correlation, correlated_stack)
    cov = cov * unscale
    best = int(np.argmax(loglik_k))
    s2, w = float(s2_k[best]), float(w_k[best])
    return DisturbanceCovariance(
        0.5 * (cov + cov.T),
        np.array([t_quantile(d) for d in dof]),
        float(weight @ (w_k * a_k)),
        math.sqrt(s2 * (1.0 - w)),
        math.sqrt(s2 * w),
        float(correlations[j_k[best]]) if w > 0 else 0.0,
    )


def sandwich_covariance_result(jacobian: np.ndarray, residuals: np.ndarray) -> DisturbanceCovariance:
    """:func:`sandwich_covariance` (AR(1) residuals) as a :class:`DisturbanceCovariance`."""
    cov, phi, dof = sandwich_covariance(jacobian, residuals)
    sd = math.sqrt(float(np.dot(residuals, residuals)) / max(len(residuals), 1))
    p = cov.shape[0]
    return DisturbanceCovariance(cov, np.full(p, t_quantile(dof)), phi, sd, 0.0, 0.0)
