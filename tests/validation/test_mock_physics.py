"""Physics of the mocks against published linear theory.

* Lognormal boxes: redshift-space xi_0, xi_2 over 30-150 Mpc/h against linear Kaiser
  multipoles (Kaiser 1987; Hamilton 1992; REFERENCES sec. 3), and P_0, P_2 at k < 0.1 h/Mpc.
* Zel'dovich boxes: the cross-correlation with the initial field (the propagator) is damped by
  exp(-k^2 [(1 - mu^2) s_perp^2 + mu^2 s_par^2] / 2) with s_perp = sigma_psi and
  s_par = (1 + f) sigma_psi, sigma_psi^2 = (1 / 6 pi^2) int P dk (Crocce & Scoccimarro 2006,
  PRD 73, 063519; Matsubara 2008, PRD 77, 063530, eq. 29 [both from memory]). The BAO in
  P(k) is damped by the square, exp(-k^2 Sigma^2 / 2) with Sigma_perp = sqrt(2) sigma_psi and
  Sigma_par = (1 + f) Sigma_perp (Eisenstein, Seo & White 2007 give the same (1 + f) scaling;
  REFERENCES sec. 12, their Sigma_0 normalisation is unverified there and not used here).
* Zel'dovich boxes: the measured xi_0, xi_2 match the Zel'dovich correlation function of
  Lagrangian-biased tracers (Carlson, Reid & White 2013; White 2014 [both from memory];
  corrpipe.theory.zeldovich, itself tested against quadrature and its Kaiser limit), which
  linear Kaiser does not.
* Injected dilation: a stretched box has P_f(k) = P(k_true) / (alpha_par alpha_perp^2)
  (coordinate rescaling, the Alcock-Paczynski effect; Alcock & Paczynski 1979).

The input spectrum is corrpipe.theory's EH98 P(k) (only an input here); every expectation is
computed in the test with numpy/scipy. Seeds are fixed, so the tests are deterministic; the
tolerances are stated at each assertion.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize
from scipy.special import spherical_jn

from corrpipe import mesh
from corrpipe.cosmology import preset
from corrpipe.mocks import (clipped_bias_moments, displacement_variance, linear_density,
                            lognormal_box, zeldovich_box)
from corrpipe.mocks.fields import power_on_mesh
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.zeldovich import ZeldovichFunctions, zeldovich_multipoles

Z = 0.5
COSMO = preset("planck2018")
POWER = LinearPower.eisenstein_hu(COSMO, z=Z)
F = float(COSMO.growth_rate(Z))


def _legendre(ell, mu):
    return np.polynomial.legendre.Legendre.basis(ell)(mu)


def _xi_ell(r, ell, bias):
    """Real-space Hankel transform of b^2 P: (i^l / 2 pi^2) int k^2 P j_l(k r) dk (trapezoid)."""
    k = np.geomspace(1e-4, 3.0, 12000)
    pk = bias**2 * POWER(k) * np.exp(-k**2)  # a = 1 Mpc/h convergence damping (REFERENCES 7)
    out = np.array([np.trapezoid(k**2 * pk * spherical_jn(ell, k * ri), k) for ri in r])
    return (-1) ** (ell // 2) * out / (2 * np.pi**2)


@pytest.mark.slow
def test_lognormal_multipoles_match_linear_kaiser():
    # Kaiser 1987 factors (REFERENCES sec. 3): xi_0 = (1 + 2b/3 + b^2/5) xi_0^r,
    # xi_2 = (4b/3 + 4b^2/7) xi_2^r with xi_2^r the l = 2 Hankel transform of P (equivalent to
    # Hamilton's 1992 xi - xibar). Theory is evaluated at every mesh lag and projected like the
    # measurement. 8 mocks of (1 Gpc/h)^3, b = 2, nbar = 3e-4. "Within errors" here means the
    # error of one (1 Gpc/h)^3 box (the scatter of the mocks): every bin of the 8-mock mean
    # within 2.5 of those errors and their rms over the bins below 1. (With 20 mocks the
    # lognormal field with linear velocities shows a ~4% excess of xi_0 at 30-40 Mpc/h and
    # ~3% in xi_2 at 40-70 Mpc/h, about 0.5-1 single-box sigma: small-scale non-linearity of
    # the lognormal transform and of the velocity mapping, which linear Kaiser ignores.)
    box, n, nbar, bias = 1000.0, 128, 3e-4, 2.0
    beta = F / bias
    edges = np.arange(30.0, 151.0, 10.0)
    xis, pks = [], []
    k_edges = np.array([0.02, 0.04, 0.06, 0.08, 0.10])
    for seed in range(8):
        m = lognormal_box(POWER, box, n, nbar, bias, F, seed=100 + seed, progress=False)
        pos = m.redshift_space_positions(los_axis=2)
        delta = mesh.density_contrast(mesh.paint(pos, box, n, scheme="cic"))
        shot = box**3 / len(pos)
        s, xi = mesh.correlation_multipoles(delta, box, edges, ells=(0, 2), scheme="cic",
                                            shot_noise=shot)
        pk = mesh.power_multipoles(delta, box, k_edges, ells=(0, 2), scheme="cic",
                                   shot_noise=shot)
        xis.append(xi)
        pks.append(pk.power)
    xis, pks = np.array(xis), np.array(pks)

    # theory at the mesh lags, projected like the measurement
    r_tab = np.linspace(25.0, 160.0, 136)
    x0 = (1 + 2 * beta / 3 + beta**2 / 5) * _xi_ell(r_tab, 0, bias)
    x2 = (4 * beta / 3 + 4 * beta**2 / 7) * _xi_ell(r_tab, 2, bias)
    lag = np.fft.fftfreq(n, 1.0 / n) * box / n
    rx, ry, rz = np.meshgrid(lag, lag, lag, indexing="ij")
    r = np.sqrt(rx**2 + ry**2 + rz**2)
    sel = (r >= edges[0]) & (r < edges[-1])
    r, mu = r[sel], rz[sel] / r[sel]
    model = np.interp(r, r_tab, x0) + np.interp(r, r_tab, x2) * _legendre(2, mu)
    idx = np.digitize(r, edges) - 1
    cnt = np.bincount(idx)
    want = [np.bincount(idx, model) / cnt, 5 * np.bincount(idx, model * _legendre(2, mu)) / cnt]
    for ell in (0, 1):
        err_single = xis[:, ell].std(axis=0, ddof=1)
        pull = (xis[:, ell].mean(axis=0) - want[ell]) / err_single
        assert np.all(np.abs(pull) < 2.5), (ell, pull)
        assert np.sqrt(np.mean(pull**2)) < 1.0, (ell, pull)
        # and the signal is many single-box errors away from zero (the test has power)
        assert np.sqrt(np.mean((want[ell] / err_single) ** 2)) > 5

    # Fourier space, k < 0.1 h/Mpc: P_l = Kaiser factor * b^2 P(k) at the bins' mean k,
    # within 4 sigma of the error of the 8-mock mean per bin.
    kmean = pk.k
    kaiser = [(1 + 2 * beta / 3 + beta**2 / 5), (4 * beta / 3 + 4 * beta**2 / 7)]
    for ell in (0, 1):
        want_p = kaiser[ell] * bias**2 * POWER(kmean)
        err = pks[:, ell].std(axis=0, ddof=1) / np.sqrt(len(pks))
        assert np.all(np.abs(pks[:, ell].mean(axis=0) - want_p) < 4 * err), ell


def _project(r_tab, multipoles, ells, box, n, edges):
    """Bin-average sum_l xi_l(r) L_l(mu) over the mesh lags like the measurement does."""
    lag = np.fft.fftfreq(n, 1.0 / n) * box / n
    rx, ry, rz = np.meshgrid(lag, lag, lag, indexing="ij")
    r = np.sqrt(rx**2 + ry**2 + rz**2)
    sel = (r >= edges[0]) & (r < edges[-1])
    r, mu = r[sel], rz[sel] / r[sel]
    model = sum(np.interp(r, r_tab, m) * _legendre(ell, mu) for ell, m in zip(ells, multipoles))
    idx = np.digitize(r, edges) - 1
    cnt = np.bincount(idx)
    return np.array([(2 * ell + 1) * np.bincount(idx, model * _legendre(ell, mu)) / cnt
                     for ell in (0, 2)])


@pytest.mark.slow
def test_zeldovich_multipoles_match_the_zeldovich_prediction():
    # 8 Zel'dovich boxes of (1 Gpc/h)^3, b = 2 (Lagrangian b1 = 1 and the b2 of their clipped
    # selection weights), nbar = 3e-4, redshift space along z. Prediction: the Zel'dovich
    # correlation function (module docstring references), projected onto the mesh lags like
    # the measurement. Within errors here means the error of the 8-mock mean: every bin of
    # 30-150 Mpc/h within 3 of it and the rms pull below 1.3 (measured 0.88 / 0.77). Linear
    # Kaiser (no damping, no mode coupling; Kaiser 1987) misses by rms 1.5 / 3.5 of the same
    # errors, so the test can tell the two apart.
    box, n, nbar, bias = 1000.0, 128, 3e-4, 2.0
    edges = np.arange(30.0, 151.0, 10.0)
    xis = []
    for seed in range(8):
        m = zeldovich_box(POWER, box, n, nbar, bias, F, seed=300 + seed, progress=False)
        delta = mesh.density_contrast(mesh.paint(m.redshift_space_positions(los_axis=2), box,
                                                 n, scheme="cic"))
        _, xi = mesh.correlation_multipoles(delta, box, edges, ells=(0, 2), scheme="cic",
                                            shot_noise=box**3 / len(m.positions))
        xis.append(xi)
    xis = np.array(xis)
    err_mean = xis.std(axis=0, ddof=1) / np.sqrt(len(xis))
    b1, b2 = clipped_bias_moments(m.meta["b_lagrangian_weight"], m.meta["sigma_weight_field"])
    r_tab = np.arange(25.0, 161.0, 5.0)
    ells = (0, 2, 4)
    za = zeldovich_multipoles(ZeldovichFunctions(POWER), r_tab, ells, b1=b1, b2=b2, f=F, n_mu=4)
    want = _project(r_tab, za, ells, box, n, edges)
    pull = (xis.mean(axis=0) - want) / err_mean
    assert np.all(np.abs(pull) < 3.0), pull
    assert np.all(np.sqrt(np.mean(pull**2, axis=1)) < 1.3), pull
    beta = F / bias
    kaiser = [(1 + 2 * beta / 3 + beta**2 / 5) * _xi_ell(r_tab, 0, bias),
              (4 * beta / 3 + 4 * beta**2 / 7) * _xi_ell(r_tab, 2, bias)]
    pull_kaiser = (xis.mean(axis=0) - _project(r_tab, kaiser, (0, 2), box, n, edges)) / err_mean
    assert np.sqrt(np.mean(pull_kaiser**2, axis=1)).max() > 2.0, pull_kaiser


def _cross_ratio(field, linear, box, k_edges):
    cross = mesh.power_multipoles(field, box, k_edges, ells=(0, 2), scheme="cic", other=linear,
                                  other_scheme=None)
    auto = mesh.power_multipoles(linear, box, k_edges, ells=(0,), scheme=None)
    return cross.k, cross.power / auto.power[0]


def _propagator_multipoles(k, f, s_perp, s_par, bias=1.0):
    mu = np.linspace(-1.0, 1.0, 801)
    kernel = (bias + f * mu[None] ** 2) * np.exp(
        -0.5 * k[:, None] ** 2 * ((1 - mu[None] ** 2) * s_perp**2 + mu[None] ** 2 * s_par**2))
    return np.array([(2 * ell + 1) / 2 * np.trapezoid(kernel * _legendre(ell, mu)[None], mu,
                                                       axis=1) for ell in (0, 2)])


@pytest.mark.slow
def test_zeldovich_damping_matches_rms_displacement():
    # Crocce & Scoccimarro 2006 / Matsubara 2008 [from memory]: in the Zel'dovich approximation
    # <delta_s(k) delta_L*(k)> / P_L = (1 + f mu^2) exp(-k^2 sigma^2 [1 + f (f + 2) mu^2] / 2),
    # exactly, with sigma^2 the 1-D displacement variance. We fit s_perp, s_par to the
    # monopole and quadrupole of the measured ratio (0.1 < k < 0.4 h/Mpc, all 128^3 particles,
    # (600 Mpc/h)^3) and require both within 5% of the predicted sigma_psi and (1 + f) sigma_psi
    # (5%: mode-coupling scatter of one box, measured ~2%).
    box, n, seed = 600.0, 128, 21
    m = zeldovich_box(POWER, box, n, 0.999 * (n / box) ** 3, 1.0, F, seed=seed, progress=False)
    linear = linear_density(POWER, box, n, seed)
    sigma_psi = np.sqrt(displacement_variance(power_on_mesh(POWER, n, box), box))
    k_edges = np.linspace(0.1, 0.4, 13)
    delta = mesh.density_contrast(mesh.paint(m.redshift_space_positions(2), box, n, scheme="cic"))
    k, ratio = _cross_ratio(delta, linear, box, k_edges)

    def residual(p):
        return (_propagator_multipoles(k, F, p[0], p[1]) - ratio).ravel()

    fit = optimize.least_squares(residual, x0=[3.0, 6.0])
    s_perp, s_par = fit.x
    assert s_perp == pytest.approx(sigma_psi, rel=0.05)
    assert s_par == pytest.approx((1 + F) * sigma_psi, rel=0.05)
    # The BAO damping scales in the P(k) template convention exp(-k^2 Sigma^2 / 2):
    sigma_perp_bao, sigma_par_bao = np.sqrt(2) * s_perp, np.sqrt(2) * s_par
    assert sigma_perp_bao == pytest.approx(np.sqrt(2) * sigma_psi, rel=0.05)
    assert sigma_par_bao / sigma_perp_bao == pytest.approx(1 + F, rel=0.07)
    # sigma_psi of the mesh sum equals the continuum (1 / 6 pi^2) int P dk within 5%
    # (the mesh misses k below 2 pi / L and above the corner of the k-cube).
    kk = np.geomspace(2 * np.pi / box, np.sqrt(3) * np.pi * n / box, 4000)
    assert sigma_psi == pytest.approx(np.sqrt(np.trapezoid(POWER(kk), kk) / (6 * np.pi**2)),
                                      rel=0.05)


@pytest.mark.slow
def test_zeldovich_lagrangian_bias_sampling():
    # Eulerian bias b = 1 + b_L for Lagrangian-biased tracers at large scales (e.g. Matsubara
    # 2008 [from memory]): the real-space galaxy x linear cross ratio divided by the propagator
    # exp(-k^2 sigma^2 / 2) is 1 + b_L exp(-k^2 R^2 / 2) at 0.02 < k < 0.1 h/Mpc, R the
    # smoothing of the weight field (needed to reach b = 2 on a 4.7 Mpc/h lattice). Tolerance
    # 5% (shot noise and mode coupling of one box).
    box, n, seed, bias, radius = 600.0, 128, 22, 2.0, 4.0
    m = zeldovich_box(POWER, box, n, 1e-3, bias, F, seed=seed, bias_smoothing=radius,
                      progress=False)
    linear = linear_density(POWER, box, n, seed)
    delta = mesh.density_contrast(mesh.paint(m.positions, box, n, scheme="cic"))
    k, ratio = _cross_ratio(delta, linear, box, np.linspace(0.02, 0.1, 5))
    sigma2 = m.meta["sigma_psi"] ** 2
    measured = ratio[0] / np.exp(-0.5 * k**2 * sigma2)
    expected = 1 + (bias - 1) * np.exp(-0.5 * (k * radius) ** 2)
    np.testing.assert_allclose(measured, expected, rtol=0.05)


@pytest.mark.slow
def test_stretched_box_carries_the_injected_dilation():
    # Alcock & Paczynski 1979 geometry: in coordinates x_i = x_true,i / alpha_i the power is
    # P(k_true) / (alpha_par alpha_perp^2) with k_true,i = k_i / alpha_i. Real-space lognormal
    # boxes (f = 0) with alpha_par = 1.10, alpha_perp = 0.95; the measured quadrupole-to-
    # monopole ratio at 0.05 < k < 0.2 h/Mpc matches the mode-averaged expectation within 4
    # sigma (+0.01) of the error of the mean of 3 mocks, and is inconsistent with zero.
    box, n, bias, ap, at = 1000.0, 128, 2.0, 1.10, 0.95
    k_edges = np.linspace(0.05, 0.2, 6)
    ratios = []
    for seed in range(3):
        m = lognormal_box(POWER, box, n, 5e-4, bias, 0.0, seed=200 + seed, alpha_par=ap,
                          alpha_perp=at, los_axis=2, progress=False)
        delta = mesh.density_contrast(mesh.paint(m.positions, box, n, scheme="cic"))
        res = mesh.power_multipoles(delta, box, k_edges, ells=(0, 2), scheme="cic",
                                    shot_noise=box**3 / len(m))
        ratios.append(res.power[1] / res.power[0])
    ratios = np.array(ratios)
    # expectation over the modes of each shell, computed here with numpy
    k1 = 2 * np.pi / box * np.fft.fftfreq(n, 1.0 / n)
    kx, ky, kz = np.meshgrid(k1, k1, k1, indexing="ij")
    kk = np.sqrt(kx**2 + ky**2 + kz**2)
    ktrue = np.sqrt((kx / at) ** 2 + (ky / at) ** 2 + (kz / ap) ** 2)
    with np.errstate(invalid="ignore", divide="ignore"):
        mu = np.where(kk > 0, kz / kk, 0.0)
    p = POWER(np.where(ktrue > 0, ktrue, 1.0)) / (ap * at * at)
    idx = np.digitize(kk.ravel(), k_edges) - 1
    ok = (idx >= 0) & (idx < k_edges.size - 1)
    p0 = np.bincount(idx[ok], p.ravel()[ok])
    p2 = 5 * np.bincount(idx[ok], (p * _legendre(2, mu)).ravel()[ok])
    want = p2 / p0
    err = ratios.std(axis=0, ddof=1) / np.sqrt(len(ratios))
    assert np.all(np.abs(ratios.mean(axis=0) - want) < 4 * err + 0.01)
    # and no dilation (quadrupole 0) is excluded: chi-square against it is > 10x larger
    chi2_want = np.sum(((ratios.mean(axis=0) - want) / err) ** 2)
    chi2_none = np.sum((ratios.mean(axis=0) / err) ** 2)
    assert chi2_none > 10 * max(chi2_want, 1.0)
