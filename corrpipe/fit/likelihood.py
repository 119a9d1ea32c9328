"""Gaussian likelihood of correlation-function multipoles with a marginalised broadband.

Data-vector layout: blocks of one multipole each, in the order of ``ells``, every block over
the same separations ``s`` (``[xi_0(s_1..s_n), xi_2(s_1..s_n), ...]``); the covariance uses
the same order.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from corrpipe.errors import InputError
from corrpipe.fit.settings import FitSettings
from corrpipe.theory.kernels import dilated_projection, dilated_projection_damped
from corrpipe.theory.template import BAOTemplate, multipole_weights, wedge_weights

__all__ = ["Likelihood", "Parameter", "PHYSICAL_NAMES", "check_covariance"]

PHYSICAL_NAMES = ("alpha_par", "alpha_perp", "B", "beta", "sigma_par", "sigma_perp", "sigma_s")


@dataclass(frozen=True)
class Parameter:
    """One sampled parameter: flat bounds and an optional Gaussian prior.

    ``log_gaussian`` puts the Gaussian on ln(value) instead of the value.
    """

    name: str
    low: float
    high: float
    centre: float
    width: float = 0.0
    log_gaussian: bool = False

    def log_prior(self, x: float) -> float:
        """Log prior density (unnormalised); -inf outside the bounds."""
        if not (self.low <= x <= self.high):
            return -np.inf
        if self.width <= 0.0:
            return 0.0
        u = (np.log(x) - np.log(self.centre) if self.log_gaussian else x - self.centre)
        return -0.5 * (u / self.width) ** 2


def _damping_axis(centre: float, width: float, step: float) -> np.ndarray:
    """Uniform damping-scale axis over centre +- 3 width, inside [0, 30] Mpc/h."""
    lo = max(0.0, centre - 3.0 * width)
    hi = min(30.0, centre + 3.0 * width)
    n = max(2, int(np.ceil((hi - lo) / step - 1e-9)) + 1)
    return lo + (hi - lo) / (n - 1) * np.arange(n)


def check_covariance(cov: np.ndarray, what: str) -> np.ndarray:
    """Check a covariance block and return its inverse.

    Raises
    ------
    InputError
        Non-finite, non-symmetric, not positive definite or numerically singular.
    """
    if not np.all(np.isfinite(cov)):
        raise InputError(f"{what}: the covariance has {np.sum(~np.isfinite(cov))} non-finite "
                         "entries")
    scale = np.max(np.abs(cov))
    if scale == 0:
        raise InputError(f"{what}: the covariance is all zeros")
    if not np.allclose(cov, cov.T, rtol=1e-6, atol=1e-10 * scale):
        raise InputError(f"{what}: the covariance is not symmetric (max |C - C^T| = "
                         f"{np.max(np.abs(cov - cov.T)):.3g}); check its layout")
    eig = np.linalg.eigvalsh(0.5 * (cov + cov.T))
    if eig[0] <= 0 or eig[0] < 1e-13 * eig[-1]:
        raise InputError(
            f"{what}: the covariance is singular or not positive definite (eigenvalues "
            f"{eig[0]:.3g} to {eig[-1]:.3g}, condition number "
            f"{eig[-1] / max(abs(eig[0]), 1e-300):.3g}). With a jackknife or mock covariance "
            "use more regions or mocks than data bins, or fit fewer bins (s_min, s_max, ells)")
    chol = np.linalg.cholesky(cov)
    inv_chol = np.linalg.inv(chol)
    return inv_chol.T @ inv_chol


class Likelihood:
    """Posterior of the BAO parameters given multipoles, covariance and template.

    Parameters
    ----------
    data_s : array_like, shape (n_s,)
        Separation bin centres, Mpc/h.
    data_vector : array_like, shape (len(ells) * n_s,)
        Multipoles, one block per ell (see module docstring).
    covariance : array_like, shape (len(data_vector), len(data_vector))
        Covariance of ``data_vector``.
    ells : sequence of int
        Multipoles present in ``data_vector``.
    template : BAOTemplate
        Template at the fiducial cosmology.
    settings : FitSettings
        Fit range, broadband, priors.
    precision_factor : float
        Factor applied to the inverse covariance (Hartlap et al. 2007 for mock covariances;
        1 if the covariance stage already corrected it).
    wedges : sequence of float, optional
        Wedge edges in mu; the data vector then holds one block per wedge (all fitted) and
        ``ells`` is ignored.
    progress : bool
        Show a bar while tabulating the template over damping scales (free damping only).
    terms : sequence of model terms, optional
        Extra model terms (e.g. :class:`corrpipe.fit.terms.InterloperTerm`): each brings
        ``parameters`` (sampled, after the template's), ``defaults``, ``prepare(s, mu,
        weights)`` and ``apply(template_vector, phys) -> model_vector``. Without terms the
        model is the template alone, computed exactly as before.

    Notes
    -----
    The broadband A(s) = sum_p a_{ell,p} s^p per multipole enters linearly; with flat priors
    the likelihood marginalised over the a's is, up to a constant, the profiled one:
    chi^2 = r^T [Psi - Psi A (A^T Psi A)^-1 A^T Psi] r with r = d - template (e.g. Taylor
    et al. 2010, MNRAS 408, 1502 [from memory]; common practice). The matrix in brackets is
    precomputed, so an evaluation is one kernel call and one matrix-vector product.

    Free damping scales (``sigma_prior_width > 0``): the template is tabulated once on a grid
    of (Sigma_par, Sigma_perp) spanning the prior centre +- 3 widths (step min(1, width/2)
    Mpc/h; the Gaussian prior is truncated there) and interpolated bilinearly, so an
    evaluation stays a single kernel call. Sigma_s stays fixed.
    """

    def __init__(self, data_s, data_vector, covariance, ells: Sequence[int],
                 template: BAOTemplate, settings: FitSettings = FitSettings(), *,
                 precision_factor: float = 1.0, wedges: Sequence[float] | None = None,
                 progress: bool = False, terms: Sequence = ()) -> None:
        self.settings = settings
        self.terms = tuple(terms)
        self.template = template
        s = np.asarray(data_s, dtype=float)
        d = np.asarray(data_vector, dtype=float)
        cov = np.asarray(covariance, dtype=float)
        if wedges is not None:
            n_blocks = len(wedges) - 1
            ells = tuple(range(n_blocks))  # block labels
        ells = tuple(int(e) for e in ells)
        n_s = s.size
        if s.ndim != 1 or n_s < 2 or not np.all(np.isfinite(s)) or np.any(np.diff(s) <= 0):
            raise InputError(f"fit: separations must be a 1-D increasing finite array, got "
                             f"shape {s.shape}")
        if d.shape != (len(ells) * n_s,):
            raise InputError(f"fit: data vector has shape {d.shape}; expected "
                             f"({len(ells)} multipoles x {n_s} bins,) = ({len(ells) * n_s},)")
        if not np.all(np.isfinite(d)):
            raise InputError(f"fit: data vector has {np.sum(~np.isfinite(d))} non-finite "
                             "entries (empty bins?)")
        if cov.shape != (d.size, d.size):
            raise InputError(f"fit: covariance has shape {cov.shape}; expected "
                             f"({d.size}, {d.size}) to match the data vector")
        fit_ells = settings.fit_ells if wedges is None else ells
        missing = [e for e in fit_ells if e not in ells]
        if missing:
            raise InputError(f"fit: multipoles {missing} are requested (fit.ells) but the data "
                             f"hold only {list(ells)}")
        # about the outer bin edges (half a spacing of the outermost centres)
        first = 0.5 * float(s[1] - s[0]) if s.size > 1 else 0.0
        last = 0.5 * float(s[-1] - s[-2]) if s.size > 1 else 0.0
        if settings.s_min < s[0] - first or settings.s_max > s[-1] + last:
            raise InputError(
                f"fit: the fit range s_min = {settings.s_min}, s_max = {settings.s_max} Mpc/h "
                f"lies outside the measured bins ({s[0]:g}-{s[-1]:g} Mpc/h centres); set "
                "fit.s_min/fit.s_max inside the measured range or measure wider bins")
        in_range = (s >= settings.s_min) & (s <= settings.s_max)
        n_fit_s = int(in_range.sum())
        n_bb = len(settings.broadband_powers)
        if n_fit_s < n_bb + 3:
            raise InputError(f"fit: only {n_fit_s} bins fall in {settings.s_min}-"
                             f"{settings.s_max} Mpc/h; need at least {n_bb + 3} per multipole")
        idx = np.concatenate([ells.index(e) * n_s + np.flatnonzero(in_range) for e in fit_ells])
        self.s = np.ascontiguousarray(s[in_range])
        self.ells = fit_ells
        self.data = d[idx]
        self.covariance = cov[np.ix_(idx, idx)]
        self.precision_factor = float(precision_factor)
        if not (self.precision_factor > 0):
            raise InputError(f"fit: precision factor must be positive, got {precision_factor}")
        self.precision = self.precision_factor * check_covariance(
            self.covariance, f"fit ({len(fit_ells)} multipoles x {n_fit_s} bins)")

        # Broadband design matrix, block-diagonal over multipoles.
        n_ell = len(fit_ells)
        A = np.zeros((self.data.size, n_ell * n_bb))
        for i in range(n_ell):
            for j, p in enumerate(settings.broadband_powers):
                A[i * n_fit_s:(i + 1) * n_fit_s, i * n_bb + j] = self.s ** p
        self.design = A
        M = A.T @ self.precision @ A
        if n_bb and np.linalg.cond(M) > 1e14:
            raise InputError(f"fit: the broadband powers {list(settings.broadband_powers)} are "
                             "degenerate over the fit range; use fewer powers")
        self._bb_solve = np.linalg.solve(M, A.T @ self.precision) if n_bb else \
            np.zeros((0, self.data.size))
        Q = self.precision - self.precision @ A @ self._bb_solve if n_bb else self.precision
        self._Q = np.ascontiguousarray(0.5 * (Q + Q.T))
        if wedges is None:
            self._mu, self._weights = multipole_weights(fit_ells, settings.n_mu)
        else:
            self._mu, self._weights = wedge_weights(wedges, max(4, settings.n_mu // 2))
        self.wedges = None if wedges is None else tuple(float(w) for w in wedges)
        self._out = np.empty((n_ell, n_fit_s))
        self.n_data = self.data.size
        self.n_broadband = n_ell * n_bb
        self._grid0 = float(template.grid[0])
        self._step = template.s_step
        self._check_template_range()
        for term in self.terms:
            term.prepare(self.s, self._mu, self._weights)

        # Parameters.
        sig_par, sig_perp = settings.damping
        self._fixed = {"alpha_par": 1.0, "alpha_perp": 1.0, "B": 1.0, "beta": settings.beta,
                       "sigma_par": sig_par, "sigma_perp": sig_perp,
                       "sigma_s": settings.sigma_s}
        for term in self.terms:
            self._fixed.update(term.defaults)
        self._free_damping = settings.sigma_prior_width > 0
        if self._free_damping:
            w = settings.sigma_prior_width
            step = min(1.0, 0.5 * w)
            self._damping_axes = tuple(_damping_axis(c, w, step) for c in (sig_par, sig_perp))
            self._piece_grid = template.piece_grid(*self._damping_axes, settings.sigma_s,
                                                   progress=progress)
        self.B_centre = self._amplitude_at_fiducial()
        self.parameters = self._build_parameters()
        self.names = tuple(p.name for p in self.parameters)
        self.n_dim = len(self.parameters)
        self._pos = {n: i for i, n in enumerate(self.names)}

    @property
    def marginal_precision(self) -> np.ndarray:
        """Precision matrix with the broadband terms profiled out: the metric of the fit's
        chi^2, ``chi2 = r @ marginal_precision @ r`` for the template residual r (a copy)."""
        return self._Q.copy()

    # ------------------------------------------------------------------ set-up helpers
    def _check_template_range(self) -> None:
        st = self.settings
        lo = self.s[0] * st.alpha_min * (1.0 - st.epsilon_max) ** 2
        hi = self.s[-1] * st.alpha_max * (1.0 + st.epsilon_max) ** 2
        if lo < self.template.grid[0] or hi > self.template.grid[-1]:
            raise InputError(f"fit: dilated separations {lo:g}-{hi:g} Mpc/h exceed the "
                             f"template grid {self.template.grid[0]:g}-"
                             f"{self.template.grid[-1]:g} Mpc/h; narrow the alpha prior")

    def _amplitude_at_fiducial(self) -> float:
        """Best-fit B at alpha = 1 with the other parameters at their prior centres."""
        return self.best_amplitude(self._fixed)

    def best_amplitude(self, phys: dict) -> float:
        """B minimising chi^2 with the other physical parameters fixed (the model is linear
        in B); NaN if the template has no weight in the data."""
        if not self.terms:
            u = self.template_model(dict(phys, B=1.0))
            denom = float(u @ self._Q @ u)
            return float(u @ self._Q @ self.data) / denom if denom > 0 else float("nan")
        # with terms the model is c + B u (terms are affine in the template): solve for B
        c = self.model(dict(phys, B=0.0))
        u = self.model(dict(phys, B=1.0)) - c
        denom = float(u @ self._Q @ u)
        return float(u @ self._Q @ (self.data - c)) / denom if denom > 0 else float("nan")

    def _build_parameters(self) -> tuple[Parameter, ...]:
        st = self.settings
        out = []
        if st.analysis == "isotropic":
            out.append(Parameter("alpha", st.alpha_min, st.alpha_max, 1.0))
        elif st.parametrisation == "alpha-epsilon":
            out.append(Parameter("alpha", st.alpha_min, st.alpha_max, 1.0))
            out.append(Parameter("epsilon", -st.epsilon_max, st.epsilon_max, 0.0))
        else:
            out.append(Parameter("alpha_par", st.alpha_min, st.alpha_max, 1.0))
            out.append(Parameter("alpha_perp", st.alpha_min, st.alpha_max, 1.0))
        b_width = st.log_B_prior_width
        b_centre = self.B_centre
        if not (np.isfinite(b_centre) and st.B_min < b_centre < st.B_max):
            b_width, b_centre = 0.0, 1.0  # no usable amplitude at alpha = 1: flat prior
        self.B_prior_used = b_width > 0
        out.append(Parameter("B", st.B_min, st.B_max, b_centre, b_width, log_gaussian=True))
        if st.analysis == "anisotropic" and st.beta_prior_width > 0:
            out.append(Parameter("beta", 0.0, 3.0, st.beta, st.beta_prior_width))
        if self._free_damping:
            for name, axis in zip(("sigma_par", "sigma_perp"), self._damping_axes):
                out.append(Parameter(name, float(axis[0]), float(axis[-1]), self._fixed[name],
                                     st.sigma_prior_width))
        for term in self.terms:
            out.extend(term.parameters)
        return tuple(out)

    # ------------------------------------------------------------------ parameters
    def physical(self, theta) -> dict:
        """Map sampled parameters to the physical set (alpha_par, alpha_perp, B, beta, sigmas)."""
        p = dict(self._fixed)
        for name, x in zip(self.names, theta):
            p[name] = float(x)
        if "alpha" in p:
            alpha = p.pop("alpha")
            eps = p.pop("epsilon", 0.0)
            p["alpha_par"] = alpha * (1.0 + eps) ** 2
            p["alpha_perp"] = alpha / (1.0 + eps)
        return p

    def start(self) -> np.ndarray:
        """Prior centres: alphas 1, epsilon 0, B at its fiducial-fit value."""
        return np.array([p.centre for p in self.parameters])

    # ------------------------------------------------------------------ evaluation
    def template_model(self, phys: dict) -> np.ndarray:
        """Template part of the model vector (no broadband), length n_data."""
        b, beta = phys["B"], phys["beta"]
        coeffs = np.array([b, 2.0 * b * beta, b * beta * beta])
        if self._free_damping:
            a, c = self._damping_axes
            dilated_projection_damped(self._grid0, self._step, self._piece_grid, a[0],
                                      a[1] - a[0], c[0], c[1] - c[0], phys["sigma_par"],
                                      phys["sigma_perp"], coeffs, self.s, self._mu,
                                      self._weights, phys["alpha_par"], phys["alpha_perp"],
                                      self._out)
        else:
            pieces = self.template.pieces(phys["sigma_par"], phys["sigma_perp"],
                                          phys["sigma_s"])
            dilated_projection(self._grid0, self._step, pieces, coeffs, self.s, self._mu,
                               self._weights, phys["alpha_par"], phys["alpha_perp"],
                               self._out)
        return self._out.ravel().copy()

    def model(self, phys: dict) -> np.ndarray:
        """Model vector without broadband: the template, then each term applied, n_data."""
        out = self.template_model(phys)
        for term in self.terms:
            out = term.apply(out, phys)
        return out

    def chi2(self, theta) -> float:
        """chi^2 of the data with the broadband marginalised (profiled), at ``theta``."""
        r = self.data - self.model(self.physical(theta))
        return float(r @ self._Q @ r)

    def log_prior(self, theta) -> float:
        """Sum of the parameters' log priors."""
        total = 0.0
        for p, x in zip(self.parameters, theta):
            total += p.log_prior(x)
        return total

    def log_posterior(self, theta) -> float:
        """Log posterior (unnormalised): log prior - chi^2 / 2."""
        lp = self.log_prior(theta)
        if not np.isfinite(lp):
            return -np.inf
        return lp - 0.5 * self.chi2(theta)

    __call__ = log_posterior

    def broadband(self, theta) -> np.ndarray:
        """Best-fit broadband coefficients a_{ell,p} at ``theta``, shape (n_ell, n_powers)."""
        r = self.data - self.model(self.physical(theta))
        return (self._bb_solve @ r).reshape(len(self.ells), -1)

    def full_model(self, theta) -> np.ndarray:
        """Model (template and terms) plus best-fit broadband at ``theta``, length n_data."""
        t = self.model(self.physical(theta))
        return t + self.design @ (self._bb_solve @ (self.data - t))

    @property
    def errors(self) -> np.ndarray:
        """Square root of the covariance diagonal of the fitted data vector."""
        return np.sqrt(np.diag(self.covariance))
