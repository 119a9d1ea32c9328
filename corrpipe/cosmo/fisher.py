"""Fisher (Gaussian) errors of the expansion-history parameters from a data vector.

F = J^T J with J the derivative of the whitened residuals (data and Gaussian priors) with
respect to the sampled parameters (central differences). F^{-1} is the covariance of the
parameters when the likelihood is Gaussian in them: a fast cross-check of the MCMC errors,
and, evaluated at a fiducial model with planned errors, a survey forecast (the Fisher
matrix of Tegmark, Taylor & Heavens 1997 for a Gaussian likelihood with a fixed covariance).
"""

from __future__ import annotations

import numpy as np

__all__ = ["fisher_matrix", "fisher_errors", "figure_of_merit"]


def fisher_matrix(like, theta: np.ndarray, rel_step: float = 1e-4) -> np.ndarray:
    """Fisher matrix of ``like`` (a :class:`DistanceLikelihood`) at ``theta``.

    Parameters
    ----------
    like : DistanceLikelihood
    theta : ndarray, shape (n_dim,)
    rel_step : float
        Finite-difference step as a fraction of each parameter's flat prior range.

    Returns
    -------
    ndarray, shape (n_dim, n_dim)
    """
    theta = np.asarray(theta, dtype=float)
    steps = rel_step * (like.space.high - like.space.low)
    cols = []
    for i, h in enumerate(steps):
        up, down = theta.copy(), theta.copy()
        up[i] += h
        down[i] -= h
        cols.append((like.residuals(up) - like.residuals(down)) / (2.0 * h))
    jac = np.column_stack(cols)
    return jac.T @ jac


def fisher_errors(fisher: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Parameter covariance F^{-1} and 1-sigma errors (NaN if F is singular)."""
    try:
        cov = np.linalg.inv(fisher)
    except np.linalg.LinAlgError:
        n = fisher.shape[0]
        return np.full((n, n), np.nan), np.full(n, np.nan)
    return cov, np.sqrt(np.abs(np.diag(cov)))


def figure_of_merit(cov_w0_wa: np.ndarray) -> float:
    """DETF figure of merit 1 / sqrt(det C(w0, wa)) (Albrecht et al. 2006 [from memory])."""
    det = float(np.linalg.det(np.asarray(cov_w0_wa, dtype=float)))
    return 1.0 / np.sqrt(det) if det > 0 else float("nan")
