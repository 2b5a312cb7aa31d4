"""Uncertainty of identified parameters: Jacobian covariance, autocorrelation, Cramér-Rao.

This module owns the covariance of a least-squares fit (from the Jacobian at the
optimum, widened for autocorrelated residuals) and the Cramér-Rao bound that an
efficient estimator reaches. It knows the models only through their sensitivities.
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from mapper.constants import Z95
from mapper.identification.models import fopdt_sensitivities

__all__ = [
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
    b, a = np.array([1.0]), np.array([1.0, -phi])
    flip = np.flip(x, axis=axis)
    fwd = lfilter(b, a, x, axis=axis)
    bwd = np.flip(lfilter(b, a, flip, axis=axis), axis=axis)
    return fwd + bwd - x


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
    rows = np.ascontiguousarray(J.T)  # one row per parameter: the filters run along rows
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
