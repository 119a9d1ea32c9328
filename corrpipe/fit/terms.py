"""Model terms added to the BAO template in the likelihood: line interlopers.

A term declares its sampled parameters (with priors) and their values when not sampled,
is prepared once on the likelihood's separations and quadrature, and then turns the target
template vector into the full model vector: ``model = term.apply(template, phys)``.

Line interlopers: a fraction f of the sample are objects of another emission line at another
true redshift. Their correlation function is the linear (damped, Kaiser) redshift-space model
of their own population (bias b_i, growth rate f_i, linear power at their true redshift),
seen through the stretch of the line mapping (:mod:`corrpipe.theory.interlopers`):

    xi_obs(s, mu) = (1 - f)^2 xi_target(s, mu) + f^2 xi_int(s_par / gamma_par, s_perp / gamma_perp).

The target-interloper cross term is left out: the two populations sit at true redshifts far
apart (Delta z ~ 0.3-2 for lines of different species), so their density fields are
uncorrelated and the cross-correlation vanishes (REFERENCES §15; Pullen et al. 2016 [from
memory]). For lines so close in wavelength that the true redshift ranges overlap, this term
is incomplete.

The interloper model is linear in (b^2, 2 b f_i, f_i^2) times the three Kaiser pieces, so the
three mapped multipole vectors are computed once; an evaluation costs a few vector
operations. It is computed in the fiducial cosmology at the effective redshift and is not
dilated by the sampled alphas (a second-order effect, f^2 (alpha - 1)).
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from corrpipe.errors import InputError
from corrpipe.fit.likelihood import Parameter
from corrpipe.theory.interlopers import LineMapping, line_mapping
from corrpipe.theory.kernels import dilated_projection
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate

__all__ = ["InterloperTerm", "interloper_term_from_settings", "FRACTION", "BIAS"]

FRACTION = "interloper_fraction"
BIAS = "interloper_bias"


class InterloperTerm:
    """Line-interloper contribution to the model multipoles (or wedges).

    Parameters
    ----------
    template : BAOTemplate
        Template of the interloper population at its true redshift (linear power there).
    mapping : LineMapping
        Line mapping at the target sample's effective redshift (scalar redshifts).
    growth_rate : float
        Linear growth rate f of the interloper population at its true redshift.
    damping : (float, float, float)
        (Sigma_par, Sigma_perp, Sigma_s) of the interloper template in its own frame, Mpc/h.
    fraction : (float, float, float)
        Prior of f: (centre or start, Gaussian width or 0 for flat, upper edge).
    bias : (float, float)
        Prior of b_i: (centre, Gaussian width or 0 for fixed).
    """

    def __init__(self, template: BAOTemplate, mapping: LineMapping, growth_rate: float,
                 damping: tuple[float, float, float], fraction: tuple[float, float, float],
                 bias: tuple[float, float]) -> None:
        self.template = template
        self.mapping = mapping
        self.growth_rate = float(growth_rate)
        self.damping = tuple(float(x) for x in damping)
        f_centre, f_width, f_max = (float(x) for x in fraction)
        b_centre, b_width = (float(x) for x in bias)
        params = [Parameter(FRACTION, 0.0, f_max, f_centre, f_width)]
        if b_width > 0:
            params.append(Parameter(BIAS, max(1e-3, b_centre - 5 * b_width),
                                    b_centre + 5 * b_width, b_centre, b_width))
        self.parameters = tuple(params)
        self.defaults = {FRACTION: f_centre, BIAS: b_centre}
        self.gamma_par = float(mapping.gamma_par)
        self.gamma_perp = float(mapping.gamma_perp)
        self._pieces: np.ndarray | None = None

    # ------------------------------------------------------------------ set-up
    def prepare(self, s: np.ndarray, mu: np.ndarray, weights: np.ndarray) -> None:
        """Tabulate the mapped interloper pieces on the fit's separations and quadrature.

        Parameters
        ----------
        s : ndarray, shape (n_s,)
            Fitted separations (target frame), Mpc/h.
        mu, weights : ndarray
            The likelihood's quadrature nodes on [0, 1] and projection weights (n_out, n_mu).
        """
        s = np.ascontiguousarray(s, dtype=float)
        a_par, a_perp = 1.0 / self.gamma_par, 1.0 / self.gamma_perp
        grid = self.template.grid
        lo, hi = s.min() * min(a_par, a_perp), s.max() * max(a_par, a_perp)
        if lo < grid[0] or hi > grid[-1]:
            raise InputError(f"interloper term: the mapped separations {lo:.3g}-{hi:.3g} Mpc/h "
                             f"(gamma_par = {self.gamma_par:.4g}, gamma_perp = "
                             f"{self.gamma_perp:.4g}) fall outside the template grid "
                             f"{grid[0]:g}-{grid[-1]:g} Mpc/h; this line pair stretches too far "
                             "for the fit range")
        pieces = self.template.pieces(*self.damping)
        out = np.empty((3, weights.shape[0], s.size))
        mu = np.ascontiguousarray(mu, dtype=float)
        weights = np.ascontiguousarray(weights, dtype=float)
        for n in range(3):
            unit = np.zeros(3)
            unit[n] = 1.0
            dilated_projection(float(grid[0]), self.template.s_step, pieces, unit, s, mu,
                               weights, a_par, a_perp, out[n])
        self._pieces = out.reshape(3, -1)

    # ------------------------------------------------------------------ evaluation
    def interloper_model(self, phys: dict) -> np.ndarray:
        """xi_int,mapped at the fit's bins for unit fraction, shape (n_data,)."""
        if self._pieces is None:
            raise InputError("interloper term used before prepare()")
        b, g = phys[BIAS], self.growth_rate
        return b * b * self._pieces[0] + 2.0 * b * g * self._pieces[1] + g * g * self._pieces[2]

    def apply(self, target: np.ndarray, phys: dict) -> np.ndarray:
        """(1 - f)^2 target + f^2 xi_int,mapped."""
        f = phys[FRACTION]
        return (1.0 - f) ** 2 * target + f * f * self.interloper_model(phys)

    def describe(self) -> dict:
        """JSON-ready description (lines, redshifts, stretch, interloper model)."""
        m = self.mapping
        return {"target_wavelength_A": float(m.target_wavelength),
                "interloper_wavelength_A": float(m.interloper_wavelength),
                "z_assigned": float(m.z_assigned), "z_true": float(m.z_true),
                "gamma_par": self.gamma_par, "gamma_perp": self.gamma_perp,
                "growth_rate": self.growth_rate, "damping": list(self.damping),
                "cross_term": "omitted (true redshift ranges do not overlap)"}


def interloper_term_from_settings(settings: Any, cosmology: Any, z_eff: float,
                                  target_power: LinearPower | None = None) -> InterloperTerm:
    """The interloper term a :class:`~corrpipe.fit.settings.FitSettings` asks for.

    Parameters
    ----------
    settings : FitSettings
        With ``target_line`` and ``interloper_line`` set.
    cosmology : corrpipe.cosmology.Cosmology
        Fiducial cosmology (mapping, growth, EH98 power).
    z_eff : float
        Effective (assigned) redshift of the target sample.
    target_power : LinearPower, optional
        The target's linear power; a tabulated spectrum (``power_spectrum = 'file'``) is
        rescaled to the interloper redshift by the growth factor ratio squared.

    Notes
    -----
    Default interloper damping: the target's Sigma_par, Sigma_perp scaled by
    D(z_true) / D(z_eff), since the Lagrangian displacement that damps the BAO grows as D
    (Eisenstein, Seo & White 2007, ApJ 664, 675 [from memory]; common practice).
    """
    mapping = line_mapping(cosmology, settings.target_line, settings.interloper_line,
                           float(z_eff), medium=settings.line_medium)
    z_true = float(mapping.z_true)
    growth_ratio = float(cosmology.growth_factor(z_true) / cosmology.growth_factor(z_eff))
    if settings.power_spectrum == "file":
        base = target_power if target_power is not None else LinearPower.from_file(
            settings.power_file, cosmology, z=z_eff, width_ln_k=settings.nowiggle_width)
        power = dataclasses.replace(base, power=base.power * growth_ratio**2,
                                    power_nowiggle=base.power_nowiggle * growth_ratio**2,
                                    z=z_true, source=f"{base.source} scaled to z = {z_true:.4g}")
    else:
        power = LinearPower.eisenstein_hu(cosmology, z_true, "wiggle",
                                          normalisation=settings.normalisation,
                                          A_s=settings.A_s)
    template = BAOTemplate(power, recon_convention="keep-rsd",
                           hankel_damping=settings.hankel_damping)
    sig_par, sig_perp = settings.damping
    if settings.interloper_sigma_par is not None:
        sig_par = float(settings.interloper_sigma_par)
    else:
        sig_par *= growth_ratio
    if settings.interloper_sigma_perp is not None:
        sig_perp = float(settings.interloper_sigma_perp)
    else:
        sig_perp *= growth_ratio
    growth = settings.interloper_growth_rate
    if growth is None:
        growth = float(cosmology.growth_rate(z_true))
    return InterloperTerm(template, mapping, growth, (sig_par, sig_perp, settings.sigma_s),
                          (settings.interloper_fraction, settings.interloper_fraction_width,
                           settings.interloper_fraction_max),
                          (settings.interloper_bias, settings.interloper_bias_width))
