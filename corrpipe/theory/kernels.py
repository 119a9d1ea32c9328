"""numba kernels of the template: the dilated, re-projected correlation function.

Flat module of ``@njit`` functions taking only arrays and numbers (see STYLE.md, three layers).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["dilated_projection"]


@njit(cache=True)
def dilated_projection(grid_start, grid_step, pieces, coeffs, s, mu, weights,
                       alpha_par, alpha_perp, out):
    """Project the dilated template xi(s', mu') onto output blocks (multipoles or wedges).

    Parameters
    ----------
    grid_start, grid_step : float
        Uniform separation grid of the template pieces, Mpc/h.
    pieces : float64 array (3, n_terms, n_grid)
        Template multipoles ell' = 0, 2, 4, one row per term of the RSD polynomial.
    coeffs : float64 array (n_terms,)
        Weight of each term (e.g. B, 2 B beta, B beta^2).
    s : float64 array (n_s,)
        Separations in the fiducial cosmology, Mpc/h.
    mu : float64 array (n_mu,)
        Cosines of the fiducial pair to the line of sight (quadrature nodes in [0, 1]).
    weights : float64 array (n_out, n_mu)
        out[o, i] = sum_j weights[o, j] xi(s_i, mu_j).
    alpha_par, alpha_perp : float
        Dilations along and across the line of sight.
    out : float64 array (n_out, n_s)
        Filled in place.
    """
    n_grid = pieces.shape[2]
    n_terms = pieces.shape[1]
    n_out = weights.shape[0]
    for o in range(n_out):
        for i in range(s.shape[0]):
            out[o, i] = 0.0
    a2 = alpha_par * alpha_par
    b2 = alpha_perp * alpha_perp
    for j in range(mu.shape[0]):
        m = mu[j]
        factor = np.sqrt(a2 * m * m + b2 * (1.0 - m * m))
        mp = alpha_par * m / factor
        mp2 = mp * mp
        leg2 = 0.5 * (3.0 * mp2 - 1.0)
        leg4 = (35.0 * mp2 * mp2 - 30.0 * mp2 + 3.0) / 8.0
        for i in range(s.shape[0]):
            x = (s[i] * factor - grid_start) / grid_step
            if x < 0.0:
                x = 0.0
            if x > n_grid - 1.000001:
                x = n_grid - 1.000001
            idx = int(x)
            t = x - idx
            v0 = 0.0
            v2 = 0.0
            v4 = 0.0
            for n in range(n_terms):
                c = coeffs[n]
                v0 += c * (pieces[0, n, idx] + t * (pieces[0, n, idx + 1] - pieces[0, n, idx]))
                v2 += c * (pieces[1, n, idx] + t * (pieces[1, n, idx + 1] - pieces[1, n, idx]))
                v4 += c * (pieces[2, n, idx] + t * (pieces[2, n, idx + 1] - pieces[2, n, idx]))
            xi = v0 + v2 * leg2 + v4 * leg4
            for o in range(n_out):
                out[o, i] += weights[o, j] * xi
