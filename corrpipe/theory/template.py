"""Redshift-space BAO template: P(k, mu) -> xi_ell(s) -> dilated multipoles in the fiducial frame.

The template power spectrum is

    P(k, mu) = B K(k, mu; beta)^2 F(k mu; Sigma_s) [P_nw + (P_lin - P_nw) D(k, mu)],
    D = exp(-k^2 [mu^2 Sigma_par^2 + (1 - mu^2) Sigma_perp^2] / 2),
    F = 1 / (1 + k^2 mu^2 Sigma_s^2 / 2)^2,

with K = 1 + beta mu^2 ("keep-rsd": pre-reconstruction, or reconstruction that keeps the
redshift-space distortions) or K = 1 + beta mu^2 [1 - S(k)], S = exp(-k^2 R^2 / 2)
("remove-rsd": reconstruction that removes the linear RSD, with smoothing radius R). Because
K^2 is a polynomial in beta, the template is stored as three terms (beta^0, beta^1, beta^2),
each with its multipoles ell' = 0, 2, 4 transformed to configuration space once; B and beta
then cost nothing per evaluation.

Notes
-----
Kaiser 1987, MNRAS 227, 1 (the (1 + beta mu^2)^2 factor); anisotropic damping of the wiggles
from Eisenstein, Seo & White 2007, ApJ 664, 675 [from memory]; the Lorentzian-squared finger-
of-god factor and the [1 - S(k)] form of the post-reconstruction Kaiser term follow Seo et al.
2016, MNRAS 460, 2453 [from memory]; dilation in configuration space as in Xu et al. 2013,
MNRAS 431, 2834 (REFERENCES §7).
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np
from scipy.interpolate import CubicSpline

from corrpipe.errors import InputError
from corrpipe.theory.hankel import pk_to_xi_grid
from corrpipe.theory.kernels import dilated_projection
from corrpipe.theory.linear_power import LinearPower
from corrpipe.terminal import show_bars

__all__ = [
    "BAOTemplate",
    "RECON_CONVENTIONS",
    "multipole_weights",
    "wedge_weights",
    "legendre",
]

RECON_CONVENTIONS = ("keep-rsd", "remove-rsd")
_TEMPLATE_ELLS = (0, 2, 4)


def legendre(ell: int, mu) -> np.ndarray:
    """Legendre polynomial L_ell(mu) for ell in {0, 2, 4}."""
    mu = np.asarray(mu, dtype=float)
    if ell == 0:
        return np.ones_like(mu)
    if ell == 2:
        return 0.5 * (3.0 * mu**2 - 1.0)
    if ell == 4:
        return (35.0 * mu**4 - 30.0 * mu**2 + 3.0) / 8.0
    raise InputError(f"multipole ell = {ell} is not supported; use 0, 2 or 4")


def multipole_weights(ells: Sequence[int], n_mu: int = 16) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes on [0, 1] and projection weights onto multipoles.

    Returns
    -------
    mu : ndarray, shape (n_mu,)
    weights : ndarray, shape (len(ells), n_mu)
        xi_ell(s) = sum_j weights[ell, j] xi(s, mu_j) = (2 ell + 1) int_0^1 xi L_ell dmu
        (xi(s, mu) is even in mu).
    """
    x, w = np.polynomial.legendre.leggauss(n_mu)
    mu = 0.5 * (x + 1.0)
    w = 0.5 * w
    weights = np.array([(2 * ell + 1) * w * legendre(ell, mu) for ell in ells])
    return mu, weights


def wedge_weights(edges: Sequence[float], n_mu: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Legendre nodes inside each mu wedge and the weights of the wedge averages.

    Parameters
    ----------
    edges : sequence of float
        Increasing wedge edges in [0, 1], e.g. (0, 0.5, 1) for transverse and radial wedges.
    n_mu : int
        Nodes per wedge.

    Returns
    -------
    mu : ndarray, shape (n_wedges * n_mu,)
    weights : ndarray, shape (n_wedges, n_wedges * n_mu)
        xi_w(s) = 1/(mu_b - mu_a) int_{mu_a}^{mu_b} xi(s, mu) dmu = sum_j weights[w, j] xi(s, mu_j)
        (Kazin et al. 2012, MNRAS 419, 3223 [from memory]).
    """
    edges = np.asarray(edges, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or edges[0] < 0 or edges[-1] > 1 or \
            np.any(np.diff(edges) <= 0):
        raise InputError(f"wedge edges must increase within [0, 1], got {edges.tolist()}")
    x, w = np.polynomial.legendre.leggauss(n_mu)
    n_w = edges.size - 1
    mu = np.empty(n_w * n_mu)
    weights = np.zeros((n_w, n_w * n_mu))
    for i in range(n_w):
        a, b = edges[i], edges[i + 1]
        mu[i * n_mu:(i + 1) * n_mu] = a + 0.5 * (b - a) * (x + 1.0)
        weights[i, i * n_mu:(i + 1) * n_mu] = 0.5 * w
    return mu, weights


class BAOTemplate:
    """Template correlation-function multipoles with dilation, for one linear power spectrum.

    Parameters
    ----------
    linear_power : LinearPower
        Linear power with its no-wiggle counterpart (h/Mpc, (Mpc/h)^3).
    recon_convention : {"keep-rsd", "remove-rsd"}
        Form of the Kaiser term (see module notes).
    smoothing_radius : float
        Reconstruction smoothing radius R, Mpc/h (used by ``"remove-rsd"`` only).
    hankel_damping : float
        Gaussian damping length of the Hankel transform, Mpc/h.
    s_range : (float, float)
        Separation range of the stored template pieces, Mpc/h.
    s_step : float
        Spacing of the stored pieces, Mpc/h (linear interpolation between them).
    n_mu_power : int
        Gauss-Legendre nodes for the power-spectrum multipoles.
    """

    def __init__(self, linear_power: LinearPower, *, recon_convention: str = "keep-rsd",
                 smoothing_radius: float = 15.0, hankel_damping: float = 1.0,
                 s_range: tuple[float, float] = (1.0, 400.0), s_step: float = 0.1,
                 n_mu_power: int = 48) -> None:
        if recon_convention not in RECON_CONVENTIONS:
            raise InputError(f"recon_convention must be one of {RECON_CONVENTIONS}, got "
                             f"{recon_convention!r}")
        self.linear_power = linear_power
        self.recon_convention = recon_convention
        self.smoothing_radius = float(smoothing_radius)
        self.hankel_damping = float(hankel_damping)
        self.grid = np.arange(s_range[0], s_range[1] + 0.5 * s_step, s_step)
        self.s_step = float(s_step)
        x, w = np.polynomial.legendre.leggauss(n_mu_power)
        self._mu_p = 0.5 * (x + 1.0)
        self._w_p = 0.5 * w
        self._cache_key: tuple | None = None
        self._cache: np.ndarray | None = None

    @classmethod
    def from_settings(cls, linear_power: LinearPower, settings: Any) -> "BAOTemplate":
        """Build from a :class:`corrpipe.fit.settings.FitSettings`."""
        return cls(linear_power, recon_convention=settings.recon_convention_resolved,
                   smoothing_radius=settings.smoothing_radius,
                   hankel_damping=settings.hankel_damping)

    # ---------------------------------------------------------------- power space
    def power_terms(self, sigma_par: float, sigma_perp: float, sigma_s: float,
                    k: np.ndarray | None = None) -> np.ndarray:
        """Power-spectrum multipoles of each beta term, (Mpc/h)^3.

        Parameters
        ----------
        sigma_par, sigma_perp : float
            BAO damping scales along and across the line of sight, Mpc/h.
        sigma_s : float
            Finger-of-god damping scale, Mpc/h.
        k : ndarray, optional
            Wavenumbers, h/Mpc (default: the linear power's grid).

        Returns
        -------
        ndarray, shape (3 ells, 3 terms, n_k)
            P_ell^(n)(k) for ell = 0, 2, 4 and the terms mu^(2n) K_n(k) of K^2 = sum_n
            c_n beta^n mu^(2n) K_n with (c_0, c_1, c_2) = (1, 2, 1).
        """
        lp = self.linear_power
        k = lp.k if k is None else np.asarray(k, dtype=float)
        p_lin, p_nw = lp(k), lp.nowiggle(k)
        mu = self._mu_p[None, :]
        kk = k[:, None]
        damp = np.exp(-0.5 * kk**2 * (mu**2 * sigma_par**2 + (1.0 - mu**2) * sigma_perp**2))
        fog = 1.0 / (1.0 + 0.5 * (kk * mu * sigma_s) ** 2) ** 2
        base = fog * (p_nw[:, None] + (p_lin - p_nw)[:, None] * damp)
        if self.recon_convention == "remove-rsd":
            kaiser_k = 1.0 - np.exp(-0.5 * (k * self.smoothing_radius) ** 2)
        else:
            kaiser_k = np.ones_like(k)
        out = np.empty((3, 3, k.size))
        for n in range(3):
            term = base * mu ** (2 * n) * (kaiser_k**n)[:, None]
            for i, ell in enumerate(_TEMPLATE_ELLS):
                out[i, n] = (2 * ell + 1) * term @ (self._w_p * legendre(ell, self._mu_p))
        return out

    # ---------------------------------------------------------------- configuration space
    def pieces(self, sigma_par: float, sigma_perp: float, sigma_s: float) -> np.ndarray:
        """Configuration-space template terms on the stored uniform grid.

        Returns
        -------
        ndarray, shape (3 ells, 3 terms, n_grid)
            xi_ell^(n)(s) on ``self.grid`` (Mpc/h); cached for the last damping scales.
        """
        key = (float(sigma_par), float(sigma_perp), float(sigma_s))
        if key != self._cache_key:
            p_terms = self.power_terms(*key)
            out = np.empty((3, 3, self.grid.size))
            for i, ell in enumerate(_TEMPLATE_ELLS):
                s_fft, xi = pk_to_xi_grid(self.linear_power.k, p_terms[i], ell,
                                          damping=self.hankel_damping)
                keep = (s_fft > 0.5 * self.grid[0]) & (s_fft < 2.0 * self.grid[-1])
                out[i] = CubicSpline(np.log(s_fft[keep]), xi[:, keep], axis=-1)(
                    np.log(self.grid))
            self._cache_key, self._cache = key, out
        return self._cache

    def piece_grid(self, sigma_par_values, sigma_perp_values, sigma_s: float,
                   progress: bool = False) -> np.ndarray:
        """Template pieces on a grid of damping scales (for free Sigma_par, Sigma_perp).

        Parameters
        ----------
        sigma_par_values, sigma_perp_values : array_like
            Uniformly spaced damping scales, Mpc/h.
        sigma_s : float
            Finger-of-god scale, Mpc/h (fixed).
        progress : bool
            Show a tqdm bar.

        Returns
        -------
        ndarray, shape (n_par, n_perp, 3, 3, n_grid)
        """
        from tqdm.auto import tqdm

        a = np.asarray(sigma_par_values, dtype=float)
        b = np.asarray(sigma_perp_values, dtype=float)
        out = np.empty((a.size, b.size, 3, 3, self.grid.size))
        with tqdm(total=a.size * b.size, desc="fit: damping grid", disable=not show_bars(progress),
                  leave=False) as bar:
            for i, sa in enumerate(a):
                for j, sb in enumerate(b):
                    out[i, j] = self.pieces(sa, sb, sigma_s)
                    bar.update()
        return out

    @staticmethod
    def term_coefficients(B: float, beta: float) -> np.ndarray:
        """Weights (B, 2 B beta, B beta^2) of the three template terms."""
        return np.array([B, 2.0 * B * beta, B * beta * beta])

    def projected(self, s, alpha_par: float, alpha_perp: float, mu: np.ndarray,
                  weights: np.ndarray, *, B: float = 1.0, beta: float = 0.0,
                  sigma_par: float = 0.0, sigma_perp: float = 0.0,
                  sigma_s: float = 0.0) -> np.ndarray:
        """Dilated template projected with arbitrary mu weights (multipoles or wedges).

        Parameters
        ----------
        s : array_like
            Fiducial separations, Mpc/h.
        alpha_par, alpha_perp : float
            Dilations along and across the line of sight.
        mu, weights : ndarray
            Quadrature nodes in [0, 1] and weights of shape (n_out, n_mu).
        B, beta : float
            Amplitude and RSD parameter.
        sigma_par, sigma_perp, sigma_s : float
            Damping scales, Mpc/h.

        Returns
        -------
        ndarray, shape (n_out, n_s)
        """
        s = np.ascontiguousarray(s, dtype=float)
        self._check_range(s, alpha_par, alpha_perp)
        out = np.empty((weights.shape[0], s.size))
        dilated_projection(float(self.grid[0]), self.s_step,
                           self.pieces(sigma_par, sigma_perp, sigma_s),
                           self.term_coefficients(B, beta), s, np.ascontiguousarray(mu),
                           np.ascontiguousarray(weights), float(alpha_par), float(alpha_perp),
                           out)
        return out

    def multipoles(self, s, alpha_par: float = 1.0, alpha_perp: float = 1.0,
                   ells: Sequence[int] = (0, 2), *, n_mu: int = 16, **params: float) -> np.ndarray:
        """Template multipoles at fiducial separations ``s`` for dilations alpha_par, alpha_perp.

        The model in the fiducial frame is xi(s, mu) = xi_t(s', mu') with
        s' = s sqrt(alpha_par^2 mu^2 + alpha_perp^2 (1 - mu^2)), mu' = alpha_par mu / sqrt(...),
        xi_t(s', mu') = sum_ell' xi_ell'(s') L_ell'(mu') over ell' = 0, 2, 4, projected onto
        ``ells`` with Gauss-Legendre quadrature (Xu et al. 2013, REFERENCES §7).

        Parameters
        ----------
        s : array_like
            Separations, Mpc/h.
        alpha_par, alpha_perp : float
            Dilations.
        ells : sequence of int
            Output multipoles (0, 2, 4).
        n_mu : int
            Gauss-Legendre nodes on [0, 1].
        **params
            ``B``, ``beta``, ``sigma_par``, ``sigma_perp``, ``sigma_s`` (see :meth:`projected`).

        Returns
        -------
        ndarray, shape (len(ells), n_s)
        """
        mu, weights = multipole_weights(ells, n_mu)
        return self.projected(s, alpha_par, alpha_perp, mu, weights, **params)

    def _check_range(self, s: np.ndarray, alpha_par: float, alpha_perp: float) -> None:
        lo = s.min() * min(alpha_par, alpha_perp)
        hi = s.max() * max(alpha_par, alpha_perp)
        if lo < self.grid[0] or hi > self.grid[-1]:
            raise InputError(f"template: dilated separations {lo:g}-{hi:g} Mpc/h fall outside "
                             f"the stored range {self.grid[0]:g}-{self.grid[-1]:g} Mpc/h; "
                             "narrow the fit range or the alpha prior")
