"""BAO template: Kaiser/Hamilton multipoles, dilation kernel against an oracle, BAO peak."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import cumulative_trapezoid, quad
from scipy.interpolate import CubicSpline

from corrpipe.cosmology import Cosmology
from corrpipe.theory.hankel import pk_to_xi_grid
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate, legendre

_LP = {}


def _lp(z: float = 0.5) -> LinearPower:
    if z not in _LP:
        _LP[z] = LinearPower.eisenstein_hu(Cosmology(), z)
    return _LP[z]


@pytest.mark.parametrize("beta, factors", [
    (0.35, (1.2578333, 0.5366667, 0.0280000)),
    (0.5, (1.3833333, 0.8095238, 0.0571429)),
    (1.0, (1.8666667, 1.9047619, 0.2285714)),
])
def test_kaiser_multipole_factors(beta, factors):
    # Kaiser 1987: P_0,2,4 / P_r = 1 + 2b/3 + b^2/5, 4b/3 + 4b^2/7, 8b^2/35 (REFERENCES §3 values).
    tpl = BAOTemplate(_lp())
    k = np.array([0.02, 0.1, 0.3])
    terms = tpl.power_terms(0.0, 0.0, 0.0, k)
    pl = np.einsum("lnk,n->lk", terms, tpl.term_coefficients(1.0, beta)) / _lp()(k)
    np.testing.assert_allclose(pl, np.repeat(np.array(factors)[:, None], 3, axis=1), atol=2e-7)


def test_hamilton_relations():
    # Hamilton 1992 (REFERENCES §3): xi_2 = (4b/3 + 4b^2/7)[xi - xibar],
    # xi_4 = (8b^2/35)[xi + 5/2 xibar - 7/2 xibarbar], checked with the EH98 no-wiggle P(k)
    # damped by exp(-4 k^2) and beta = 0.5; REFERENCES quotes agreement <= 1e-4 over 20-120.
    beta = 0.5
    lp = LinearPower.eisenstein_hu(Cosmology(), 0.0, "nowiggle")
    tpl = BAOTemplate(lp, hankel_damping=2.0)
    s = np.linspace(20.0, 120.0, 11)
    m = tpl.multipoles(s, 1.0, 1.0, (0, 2, 4), B=1.0, beta=beta)
    r, xi_r = pk_to_xi_grid(lp.k, lp.power, 0, damping=2.0)
    keep = (r > 1e-3) & (r < 400)
    r, xi_r = r[keep], xi_r[keep]
    bar = 3.0 / r**3 * cumulative_trapezoid(xi_r * r**2, r, initial=0.0)
    bar2 = 5.0 / r**5 * cumulative_trapezoid(xi_r * r**4, r, initial=0.0)
    xi, xb, xbb = (CubicSpline(np.log(r), y)(np.log(s)) for y in (xi_r, bar, bar2))
    np.testing.assert_allclose(m[0], (1 + 2 * beta / 3 + beta**2 / 5) * xi, rtol=2e-4)
    np.testing.assert_allclose(m[1], (4 * beta / 3 + 4 * beta**2 / 7) * (xi - xb),
                               atol=2e-4 * np.max(np.abs(m[1])))
    np.testing.assert_allclose(m[2], 8 * beta**2 / 35 * (xi + 2.5 * xb - 3.5 * xbb),
                               atol=5e-4 * np.max(np.abs(m[2])))


def test_dilation_kernel_against_quadrature_oracle():
    # Oracle: the Xu et al. 2013 mapping (REFERENCES §7) evaluated with scipy.integrate.quad
    # over mu on the same interpolated template pieces (STYLE.md 12: kernel vs slow reference).
    tpl = BAOTemplate(_lp())
    params = dict(B=1.3, beta=0.4, sigma_par=8.0, sigma_perp=4.0, sigma_s=3.0)
    s = np.array([55.0, 90.0, 105.0, 140.0])
    a_par, a_perp = 1.04, 0.97
    got = tpl.multipoles(s, a_par, a_perp, (0, 2, 4), n_mu=24, **params)
    pieces = tpl.pieces(8.0, 4.0, 3.0)
    coeffs = tpl.term_coefficients(1.3, 0.4)
    xi_l = [np.tensordot(coeffs, pieces[i], axes=(0, 0)) for i in range(3)]

    def xi_smu(si, mu):
        f = np.sqrt(a_par**2 * mu**2 + a_perp**2 * (1 - mu**2))
        sp, mp = si * f, a_par * mu / f
        return sum(np.interp(sp, tpl.grid, xi_l[i]) * legendre(ell, mp)
                   for i, ell in enumerate((0, 2, 4)))

    for o, ell in enumerate((0, 2, 4)):
        ref = [(2 * ell + 1) * quad(lambda m: xi_smu(si, m) * legendre(ell, m), 0, 1,
                                    epsabs=1e-9, epsrel=1e-7, limit=400)[0] for si in s]
        np.testing.assert_allclose(got[o], ref, atol=1e-6 * np.max(np.abs(got[0])))


def test_isotropic_dilation_is_a_rescaling():
    # alpha_par = alpha_perp = alpha: xi_0(s) -> xi_0(alpha s) exactly (derived geometry).
    tpl = BAOTemplate(_lp())
    s = np.linspace(50, 150, 21)
    params = dict(B=1.0, beta=0.4, sigma_par=10.0, sigma_perp=6.0, sigma_s=4.0)
    got = tpl.multipoles(s, 1.03, 1.03, (0,), **params)[0]
    ref = tpl.multipoles(1.03 * s, 1.0, 1.0, (0,), **params)[0]
    np.testing.assert_allclose(got, ref, atol=1e-9 * np.max(np.abs(ref)))


def test_linear_bao_peak_position():
    # The peak of the linear real-space xi(r) lies a few per cent below the sound horizon
    # (Sanchez, Baugh & Angulo 2008, MNRAS 390, 1470; Eisenstein, Seo & White 2007 [from
    # memory]); we require 0.95 < r_peak / r_d < 1.0.
    lp = _lp(0.0)
    tpl = BAOTemplate(lp, hankel_damping=0.0)
    s = np.arange(85.0, 125.0, 0.05)
    xi = tpl.multipoles(s, 1.0, 1.0, (0,), B=1.0, beta=0.0)[0]
    peak = s[np.argmax(xi)]
    r_d = lp.sound_horizon * lp.h  # Mpc/h
    assert 0.95 < peak / r_d < 1.0


def test_remove_rsd_without_smoothing_has_no_quadrupole():
    # Analytic limit: with R = 0, S(k) = 1 removes the Kaiser term; with isotropic damping and
    # no fingers of god the template is isotropic, so xi_2 = xi_4 = 0 (Seo et al. 2016 form).
    tpl = BAOTemplate(_lp(), recon_convention="remove-rsd", smoothing_radius=0.0)
    s = np.linspace(50, 150, 11)
    m = tpl.multipoles(s, 1.0, 1.0, (0, 2, 4), B=1.0, beta=0.6, sigma_par=5.0, sigma_perp=5.0)
    assert np.max(np.abs(m[1:])) < 1e-6 * np.max(np.abs(m[0]))
    keep = BAOTemplate(_lp(), recon_convention="keep-rsd")
    m2 = keep.multipoles(s, 1.0, 1.0, (0, 2), B=1.0, beta=0.6, sigma_par=5.0, sigma_perp=5.0)
    assert np.max(np.abs(m2[1])) > 0.1 * np.max(np.abs(m2[0]))


def test_wedges_from_multipoles():
    # xi_w = sum_ell xi_ell <L_ell>_w, with <L_ell>_w the mean of L_ell over the wedge (exact for
    # a template with ell <= 4; Kazin et al. 2012 [from memory]; Legendre integrals by hand).
    from corrpipe.theory.template import wedge_weights

    tpl = BAOTemplate(_lp())
    s = np.linspace(50, 150, 11)
    params = dict(B=1.0, beta=0.4, sigma_par=10.0, sigma_perp=6.0, sigma_s=4.0)
    mu, w = wedge_weights((0.0, 0.5, 1.0))
    wedges = tpl.projected(s, 1.0, 1.0, mu, w, **params)
    m = tpl.multipoles(s, 1.0, 1.0, (0, 2, 4), **params)
    # mean of L2 on [0, .5]: (mu^3 - mu)/2 / 0.5 -> -0.375; on [.5, 1]: 0.375
    # mean of L4 on [0, .5]: (7 mu^5 - 10 mu^3 + 3 mu)/8 / 0.5 -> 0.1171875; on [.5, 1]: -0.1171875
    np.testing.assert_allclose(wedges[0], m[0] - 0.375 * m[1] + 0.1171875 * m[2], rtol=1e-10)
    np.testing.assert_allclose(wedges[1], m[0] + 0.375 * m[1] - 0.1171875 * m[2], rtol=1e-10)
