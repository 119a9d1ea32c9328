"""Correlation function of Lagrangian-biased tracers in the Zel'dovich approximation.

What Zel'dovich mocks should measure, mode coupling included: the damped and slightly shifted
BAO peak that a linear template does not describe. Used to predict the dilation a BAO fit
recovers from noise-free Zel'dovich mocks (``scripts/fit_mock_mean.py --predict``).

Formulas (Carlson, Reid & White 2013, MNRAS 429, 1674, the Zel'dovich terms of their CLPT
expansion; White 2014, MNRAS 439, 3630; both from memory): with the Lagrangian separation q,
the pair displacement Delta = psi(q2) - psi(q1) and y = r - q,

    1 + xi(r) = int d^3q N(y; A(q)) [1 + b1^2 xi_L + 2 b1 U.g - (b1^2 + b2) U_i U_j G_ij
                                      + 2 b1 b2 xi_L U.g + b2^2 xi_L^2 / 2],

where N is the 3-D Gaussian of covariance A_ij = <Delta_i Delta_j> = X(q) delta_ij +
Y(q) qhat_i qhat_j, U_i = <delta_L(q1) Delta_i> = U(q) qhat_i, g = A^-1 y and
G = A^-1 - g g^T; b1 = <F'>, b2 = <F''> are the Lagrangian bias moments of the tracer's
selection F(delta_L). In redshift space (plane-parallel, line of sight z) Delta -> R Delta
with R = diag(1, 1, 1 + f), so A -> R A R and U -> R U. The q functions are

    xi_L = int k^2 P j0 / 2 pi^2,   U = -int k P j1 / 2 pi^2,
    X = (2/3) int P (1 - j0 - j2) / 2 pi^2,   Y = 2 int P j2 / 2 pi^2      (dk, argument kq),

using j1(x)/x = (j0(x) + j2(x)) / 3 to write the usual X, Y integrands as Hankel transforms.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from scipy import integrate
from scipy.special import eval_legendre

from corrpipe.errors import InputError
from corrpipe.theory.hankel import pk_to_xi

__all__ = ["ZeldovichFunctions", "zeldovich_correlation", "zeldovich_multipoles"]


class ZeldovichFunctions:
    """The q-space functions xi_L, U, X, Y of a linear power spectrum, tabulated for lookup.

    Parameters
    ----------
    power : callable
        Linear matter P(k) at the redshift of interest, k in h/Mpc, P in (Mpc/h)^3.
    damping : float
        Gaussian cut-off length a (Mpc/h): P is multiplied by exp(-k^2 a^2) everywhere,
        including the displacement variance (a stand-in for a mock's mesh resolution).
    q_max : float
        Largest Lagrangian separation tabulated, Mpc/h.
    """

    def __init__(self, power: Callable, *, damping: float = 1.0, q_max: float = 400.0):
        if not damping > 0:
            raise InputError(f"zeldovich: damping must be a positive length, got {damping!r}")
        k = np.geomspace(1e-5, 50.0, 4096)
        pk = np.asarray(power(k), dtype=float) * np.exp(-(k * damping) ** 2)
        # Lagrangian separations where the transforms are trusted (FFTLog range)
        self.q = np.geomspace(0.5, float(q_max), 2000)
        tf = dict(damping=1e-6)  # the cut-off is already in pk
        self.sigma2 = float(integrate.simpson(pk, x=k) / (6.0 * np.pi**2))  # 1-D psi variance
        self.xi = pk_to_xi(k, pk, 0, self.q, **tf)
        self.U = -pk_to_xi(k, pk / k, 1, self.q, **tf)
        j0 = pk_to_xi(k, pk / k**2, 0, self.q, **tf)
        j2 = -pk_to_xi(k, pk / k**2, 2, self.q, **tf)  # pk_to_xi has the i^2 = -1 sign
        self.X = 2.0 * self.sigma2 - (2.0 / 3.0) * (j0 + j2)
        self.Y = 2.0 * j2

    def at(self, q: np.ndarray) -> tuple[np.ndarray, ...]:
        """xi_L, U, X, Y at separations ``q`` (linear interpolation inside the table; held at
        the end values outside it)."""
        out = [np.interp(q, self.q, a) for a in (self.xi, self.U, self.X, self.Y)]
        return tuple(out)


def zeldovich_correlation(funcs: ZeldovichFunctions, r: np.ndarray, *, b1: float = 0.0,
                          b2: float = 0.0, f: float = 0.0, half_width: float | None = None,
                          step: float = 1.25) -> np.ndarray:
    """Zel'dovich correlation function at separation vectors ``r`` (line of sight along z).

    Parameters
    ----------
    funcs : ZeldovichFunctions
        Tabulated q functions of the linear power.
    r : array_like, shape (n, 3)
        Separation vectors, Mpc/h.
    b1, b2 : float
        Lagrangian bias moments <F'>, <F''> (Eulerian linear bias 1 + b1).
    f : float
        Linear growth rate (0: real space).
    half_width : float, optional
        Half side of the cube of y = r - q integrated over (default 6 times the largest
        rms pair displacement, which leaves out ~1e-8 of the Gaussian, at least 40 Mpc/h).
        The cube has (2 half_width / step)^3 points: mind the memory with small steps.
    step : float
        Grid step of the y cube, Mpc/h (a Gaussian integrand needs step < its width / 2).

    Returns
    -------
    ndarray, shape (n,)
    """
    r = np.atleast_2d(np.asarray(r, dtype=float))
    if r.shape[-1] != 3:
        raise InputError(f"zeldovich: separation vectors must have shape (n, 3), got {r.shape}")
    width = np.sqrt(2.0 * funcs.sigma2) * (1.0 + max(f, 0.0))
    if half_width is None:
        half_width = max(40.0, 6.0 * width)
    if not step < 0.5 * np.sqrt(2.0 * funcs.sigma2):
        raise InputError(f"zeldovich: step {step} Mpc/h is too coarse for the pair "
                         f"displacement width {np.sqrt(2 * funcs.sigma2):.2f} Mpc/h")
    axis = np.arange(-half_width, half_width + 0.5 * step, step)
    y = np.stack(np.meshgrid(axis, axis, axis, indexing="ij"), -1).reshape(-1, 3)
    rz = np.array([1.0, 1.0, 1.0 + f])  # R = diag(1, 1, 1 + f)
    out = np.empty(len(r))
    for n, rv in enumerate(r):
        qv = rv[None, :] - y
        q = np.linalg.norm(qv, axis=1)
        ok = q > 1.0  # pairs closer than 1 Mpc/h in Lagrangian space add nothing at r > 10
        qv, q, yy = qv[ok], q[ok], y[ok]
        qhat = qv / q[:, None]
        xi_l, U, X, Y = funcs.at(q)
        # A = R (X I + Y qhat qhat^T) R = D + Y v v^T with D = X R^2, v = R qhat:
        # Sherman-Morrison inverse and the matrix determinant lemma.
        d_inv = 1.0 / (X[:, None] * rz[None, :] ** 2)
        v = qhat * rz[None, :]
        dv = d_inv * v
        c = 1.0 + Y * np.einsum("ni,ni->n", v, dv)
        det = np.prod(1.0 / d_inv, axis=1) * c
        g = d_inv * yy - dv * (Y * np.einsum("ni,ni->n", dv, yy) / c)[:, None]
        chi2 = np.einsum("ni,ni->n", yy, g)
        # At q of a few Mpc/h A is tiny and the transforms' round-off can make it
        # indefinite; there the Gaussian at |y| ~ r is zero to machine precision anyway.
        good = (det > 0) & (chi2 >= 0)
        gauss = np.zeros_like(det)
        gauss[good] = np.exp(-0.5 * chi2[good]) / np.sqrt((2 * np.pi) ** 3 * det[good])
        u = v * U[:, None]                      # R U
        ug = np.einsum("ni,ni->n", u, g)
        u_ainv_u = (np.einsum("ni,ni->n", u, d_inv * u)
                    - Y * np.einsum("ni,ni->n", u, dv) ** 2 / c)
        ugu = u_ainv_u - ug**2                  # U_i U_j G_ij
        bracket = (1.0 + b1**2 * xi_l + 2.0 * b1 * ug - (b1**2 + b2) * ugu
                   + 2.0 * b1 * b2 * xi_l * ug + 0.5 * b2**2 * xi_l**2)
        out[n] = np.sum(gauss * bracket) * step**3 - 1.0
    return out


def zeldovich_multipoles(funcs: ZeldovichFunctions, s: Sequence[float], ells: Sequence[int],
                         *, b1: float = 0.0, b2: float = 0.0, f: float = 0.0,
                         alpha_par: float = 1.0, alpha_perp: float = 1.0, n_mu: int = 8,
                         step: float = 1.25, half_width: float | None = None) -> np.ndarray:
    """Legendre multipoles of the Zel'dovich correlation function, optionally as seen through
    a fiducial cosmology that dilates the true separations.

    Parameters
    ----------
    funcs, b1, b2, f, step, half_width
        As in :func:`zeldovich_correlation`.
    s : sequence of float
        Separations in the analysis (fiducial) coordinates, Mpc/h.
    ells : sequence of int
        Even multipoles wanted.
    alpha_par, alpha_perp : float
        True separations are (alpha_perp s_perp, alpha_par s_par) of the fiducial ones (the
        dilation the fit should recover).
    n_mu : int
        Gauss-Legendre nodes on 0 < mu < 1.

    Returns
    -------
    ndarray, shape (len(ells), len(s))
    """
    if any(int(ell) % 2 for ell in ells):
        raise InputError(f"zeldovich: only even multipoles exist here, got {list(ells)}")
    x, w = np.polynomial.legendre.leggauss(2 * int(n_mu))
    mu, w = x[x > 0], w[x > 0]
    s = np.asarray(s, dtype=float)
    ss, mm = np.meshgrid(s, mu, indexing="ij")
    r = np.stack([alpha_perp * ss * np.sqrt(1 - mm**2), np.zeros_like(ss), alpha_par * ss * mm],
                 -1).reshape(-1, 3)
    xi = zeldovich_correlation(funcs, r, b1=b1, b2=b2, f=f, step=step,
                               half_width=half_width).reshape(ss.shape)
    # integral over -1 < mu < 1 of an even function: twice the half range
    return np.array([(2 * int(ell) + 1) * np.sum(xi * w * eval_legendre(int(ell), mu), axis=1)
                     for ell in ells])
