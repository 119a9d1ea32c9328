"""BAO damping scales from the linear power (corrpipe.theory.damping)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy.special import erfc

from corrpipe.cosmology import Cosmology
from corrpipe.errors import InputError
from corrpipe.fit.run import resolve_damping
from corrpipe.fit.settings import PRE_RECON_DAMPING, FitSettings
from corrpipe.theory.damping import zeldovich_damping
from corrpipe.theory.linear_power import LinearPower


def _gaussian_power(amplitude: float, length: float) -> LinearPower:
    k = np.geomspace(1e-5, 50.0, 20000)
    p = amplitude * np.exp(-(k * length) ** 2)
    return LinearPower(k=k, power=p, power_nowiggle=p, z=0.0, sound_horizon=147.0, h=0.7,
                       source="test")


def test_integral_matches_closed_form_for_gaussian_power():
    # int_k0^inf A exp(-k^2 L^2) dk = A sqrt(pi) erfc(k0 L) / (2 L) (Gaussian integral, e.g.
    # Abramowitz & Stegun 7.1.2 [from memory]) over the grid from k0; Sigma_perp^2 = that /
    # (3 pi^2), Sigma_par = (1 + f) Sigma_perp
    amplitude, length, f = 2.0e4, 3.0, 0.8
    lp = _gaussian_power(amplitude, length)
    par, perp = zeldovich_damping(lp, f)
    integral = amplitude * np.sqrt(np.pi) * erfc(lp.k[0] * length) / (2 * length)
    expected = np.sqrt(integral / (3 * np.pi**2))
    assert perp == pytest.approx(expected, rel=1e-6)
    assert par == pytest.approx((1 + f) * perp, rel=1e-12)


def test_reconstruction_weight_matches_closed_form():
    # weight (1 - exp(-k^2 R^2/2))^2 = 1 - 2 e^{-k^2R^2/2} + e^{-k^2R^2}: three Gaussian integrals
    amplitude, length, radius = 2.0e4, 3.0, 10.0
    _, perp = zeldovich_damping(_gaussian_power(amplitude, length), 0.5, reconstructed=True,
                                smoothing_radius=radius)

    def gauss(a2):  # int exp(-a2 k^2) dk
        return 0.5 * np.sqrt(np.pi / a2)
    integral = amplitude * (gauss(length**2) - 2 * gauss(length**2 + radius**2 / 2)
                            + gauss(length**2 + radius**2))
    assert perp == pytest.approx(np.sqrt(integral / (3 * np.pi**2)), rel=1e-5)


def test_scales_follow_growth_factor_and_sigma8():
    # Sigma proportional to D(z) sigma8 (Eisenstein, Seo & White 2007 [from memory])
    cosmo = Cosmology()
    _, perp0 = zeldovich_damping(LinearPower.eisenstein_hu(cosmo, 0.0), 0.5)
    _, perp2 = zeldovich_damping(LinearPower.eisenstein_hu(cosmo, 2.0), 0.5)
    assert perp2 / perp0 == pytest.approx(float(cosmo.growth_factor(2.0)), rel=1e-10)
    low = dataclasses.replace(cosmo, sigma8=0.7)
    _, perp_low = zeldovich_damping(LinearPower.eisenstein_hu(low, 0.0), 0.5)
    assert perp_low / perp0 == pytest.approx(0.7 / cosmo.sigma8, rel=1e-10)


def test_low_redshift_values_near_the_usual_defaults():
    # At z ~ 0.5 practitioners fix Sigma_par ~ 10, Sigma_perp ~ 6 Mpc/h before reconstruction
    # (common practice, the fixed defaults of FitSettings [from memory]); the computed scales
    # agree within 15 %.
    cosmo = Cosmology()
    par, perp = zeldovich_damping(LinearPower.eisenstein_hu(cosmo, 0.5),
                                  float(cosmo.growth_rate(0.5)))
    assert perp == pytest.approx(PRE_RECON_DAMPING[1], rel=0.15)
    assert par == pytest.approx(PRE_RECON_DAMPING[0], rel=0.15)


def test_resolve_damping_fills_only_empty_scales():
    cosmo = Cosmology()
    lp = LinearPower.eisenstein_hu(cosmo, 2.5)
    fixed = FitSettings(damping_model="fixed")
    assert resolve_damping(fixed, lp, cosmo, 2.5) is fixed
    # the default follows the analysis redshift
    default = resolve_damping(FitSettings(), lp, cosmo, 2.5)
    assert default.sigma_perp == pytest.approx(zeldovich_damping(
        lp, float(cosmo.growth_rate(2.5)))[1], rel=1e-12)
    auto = resolve_damping(FitSettings(damping_model="zeldovich", sigma_perp=3.0), lp, cosmo, 2.5)
    expected_par, _ = zeldovich_damping(lp, float(cosmo.growth_rate(2.5)))
    assert auto.sigma_perp == 3.0
    assert auto.sigma_par == pytest.approx(expected_par, rel=1e-12)
    post = resolve_damping(FitSettings(damping_model="zeldovich", reconstructed=True), lp, cosmo,
                           2.5)
    assert post.sigma_perp < auto.sigma_par / (1 + float(cosmo.growth_rate(2.5)))


def test_bad_growth_rate_is_a_one_line_error():
    with pytest.raises(InputError, match="growth rate"):
        zeldovich_damping(_gaussian_power(1.0, 1.0), float("nan"))
