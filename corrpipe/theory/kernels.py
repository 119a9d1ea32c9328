"""numba kernels of the template: the dilated, re-projected correlation function.

Flat module of ``@njit`` functions taking only arrays and numbers (see STYLE.md, three layers).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["dilated_projection", "dilated_projection_damped"]


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


@njit(cache=True)
def dilated_projection_damped(grid_start, grid_step, pieces, par_start, par_step, perp_start,
                              perp_step, sigma_par, sigma_perp, coeffs, s, mu, weights,
                              alpha_par, alpha_perp, out):
    """As :func:`dilated_projection`, with pieces tabulated on a (Sigma_par, Sigma_perp) grid.

    Parameters
    ----------
    pieces : float64 array (n_par, n_perp, 3, n_terms, n_grid)
        Template pieces at damping scales par_start + i par_step, perp_start + j perp_step
        (Mpc/h); bilinear interpolation in the damping scales, linear in separation.
    sigma_par, sigma_perp : float
        Damping scales, Mpc/h (clipped to the tabulated range).
    Other parameters as in :func:`dilated_projection`.
    """
    n_par = pieces.shape[0]
    n_perp = pieces.shape[1]
    n_terms = pieces.shape[3]
    n_grid = pieces.shape[4]
    n_out = weights.shape[0]
    fa = (sigma_par - par_start) / par_step
    fb = (sigma_perp - perp_start) / perp_step
    fa = min(max(fa, 0.0), n_par - 1.000001)
    fb = min(max(fb, 0.0), n_perp - 1.000001)
    ia = int(fa)
    ib = int(fb)
    ta = fa - ia
    tb = fb - ib
    w00 = (1.0 - ta) * (1.0 - tb)
    w01 = (1.0 - ta) * tb
    w10 = ta * (1.0 - tb)
    w11 = ta * tb
    for o in range(n_out):
        for i in range(s.shape[0]):
            out[o, i] = 0.0
    a2 = alpha_par * alpha_par
    b2 = alpha_perp * alpha_perp
    vals = np.zeros(3)
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
            for ell in range(3):
                v = 0.0
                for n in range(n_terms):
                    c00 = pieces[ia, ib, ell, n, idx] + t * (
                        pieces[ia, ib, ell, n, idx + 1] - pieces[ia, ib, ell, n, idx])
                    c01 = pieces[ia, ib + 1, ell, n, idx] + t * (
                        pieces[ia, ib + 1, ell, n, idx + 1] - pieces[ia, ib + 1, ell, n, idx])
                    c10 = pieces[ia + 1, ib, ell, n, idx] + t * (
                        pieces[ia + 1, ib, ell, n, idx + 1] - pieces[ia + 1, ib, ell, n, idx])
                    c11 = pieces[ia + 1, ib + 1, ell, n, idx] + t * (
                        pieces[ia + 1, ib + 1, ell, n, idx + 1]
                        - pieces[ia + 1, ib + 1, ell, n, idx])
                    v += coeffs[n] * (w00 * c00 + w01 * c01 + w10 * c10 + w11 * c11)
                vals[ell] = v
            xi = vals[0] + vals[1] * leg2 + vals[2] * leg4
            for o in range(n_out):
                out[o, i] += weights[o, j] * xi
