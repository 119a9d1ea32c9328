"""Zel'dovich correlation function of biased tracers (corrpipe.theory.zeldovich)."""

import numpy as np
import pytest
from scipy.special import spherical_jn

from corrpipe.cosmology import preset
from corrpipe.errors import InputError
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.zeldovich import (ZeldovichFunctions, zeldovich_correlation,
                                       zeldovich_multipoles)


@pytest.fixture(scope="module")
def power():
    return LinearPower.eisenstein_hu(preset("planck2018"), z=0.5)


def _quadrature(power, q, epsilon=1.0):
    """Direct sums of the q-function integrals (Carlson, Reid & White 2013 [from memory])."""
    k = np.linspace(1e-5, 6.0, 300_000)
    dk = k[1] - k[0]
    pk = epsilon * power(k) * np.exp(-k**2)
    x = k * q
    j0, j1 = spherical_jn(0, x), spherical_jn(1, x)
    return np.array([np.sum(k**2 * pk * j0), -np.sum(k * pk * j1),
                     np.sum(pk * (2 / 3 - 2 * j1 / x)), np.sum(pk * (-2 * j0 + 6 * j1 / x)),
                     np.sum(pk) / 3]) * dk / (2 * np.pi**2)


def test_q_functions_match_direct_quadrature(power):
    # xi_L, U, X, Y by FFTLog (scipy.fft.fht) against plain sums of the defining integrals,
    # and sigma^2 = int P dk / 6 pi^2 (Carlson, Reid & White 2013 eqs. for the ZA terms,
    # from memory).
    zf = ZeldovichFunctions(power)
    for q in (20.0, 100.0):
        ref = _quadrature(power, q)
        got = np.array(zf.at(np.array([q])))[:, 0]
        np.testing.assert_allclose(got, ref[:4], rtol=2e-4, atol=1e-7)
    assert zf.sigma2 == pytest.approx(_quadrature(power, 50.0)[4], rel=1e-4)


def test_linear_limit_is_kaiser(power):
    # With a tiny amplitude the Zel'dovich xi of tracers of Eulerian bias b = 1 + b1 is the
    # linear Kaiser one: xi_0 = (b^2 + 2bf/3 + f^2/5) xi_L, xi_2 = (4bf/3 + 4f^2/7) xi_2L with
    # xi_2L = -int k^2 P j2 / 2 pi^2 (Kaiser 1987; Hamilton 1992). One-loop terms are of
    # relative order epsilon (1e-2 here) at BAO scales.
    eps, b1, f = 1e-2, 0.9, 0.7
    zf = ZeldovichFunctions(lambda k: eps * power(k))
    s = np.array([60.0, 90.0, 110.0])
    got = zeldovich_multipoles(zf, s, (0, 2), b1=b1, b2=0.0, f=f, step=0.15,
                               half_width=6.0, n_mu=6)
    k = np.linspace(1e-5, 6.0, 300_000)
    pk = eps * power(k) * np.exp(-k**2)
    xi0 = np.array([np.sum(k**2 * pk * spherical_jn(0, k * r)) for r in s]) * (k[1] - k[0])
    xi2 = -np.array([np.sum(k**2 * pk * spherical_jn(2, k * r)) for r in s]) * (k[1] - k[0])
    xi0, xi2 = xi0 / (2 * np.pi**2), xi2 / (2 * np.pi**2)
    b = 1 + b1
    np.testing.assert_allclose(got[0], (b**2 + 2 * b * f / 3 + f**2 / 5) * xi0, rtol=0.01)
    np.testing.assert_allclose(got[1], (4 * b * f / 3 + 4 * f**2 / 7) * xi2, rtol=0.01)


def test_isotropic_dilation_is_a_rescaling(power):
    # alpha_par = alpha_perp = a looks at the true xi at a * s (definition of the dilation)
    zf = ZeldovichFunctions(power)
    s = np.array([80.0, 105.0])
    a = 1.03
    one = zeldovich_multipoles(zf, s, (0, 2), b1=0.9, f=0.7, alpha_par=a, alpha_perp=a, n_mu=4)
    two = zeldovich_multipoles(zf, a * s, (0, 2), b1=0.9, f=0.7, n_mu=4)
    np.testing.assert_allclose(one, two, rtol=1e-12)


def test_bad_inputs(power):
    zf = ZeldovichFunctions(power)
    with pytest.raises(InputError, match="even multipoles"):
        zeldovich_multipoles(zf, [100.0], (1,))
    with pytest.raises(InputError, match="too coarse"):
        zeldovich_correlation(zf, [[0.0, 0.0, 100.0]], step=5.0)
    with pytest.raises(InputError, match=r"shape \(n, 3\)"):
        zeldovich_correlation(zf, [[0.0, 100.0]])


def test_mock_expectation_uses_the_mocks_bias_moments_and_distance_units():
    # zeldovich_expectation = the Zel'dovich multipoles with the b1, b2 of the mock's clipped
    # selection weights on its own mesh; with a fiducial cosmology the analysis separations
    # map to true ones by alpha (r_d h)_true / (r_d h)_fid (alpha is a ratio of D / r_d).
    import dataclasses

    from corrpipe.mocks import (MockSettings, clipped_bias_moments, lagrangian_bias_for,
                                mock_power, true_cosmology, zeldovich_expectation)
    from corrpipe.mocks.fields import mesh_variance, power_on_mesh

    st = MockSettings(kind="zeldovich", geometry="box", box_size=600.0, n_mesh=64, nbar=1e-4,
                      bias=2.0, redshift=0.5)
    cosmo = true_cosmology(st)
    power = mock_power(st, cosmo)
    sigma_w = np.sqrt(mesh_variance(power_on_mesh(power, 64, 600.0), 600.0))
    b1, b2 = clipped_bias_moments(lagrangian_bias_for(2.0, sigma_w), sigma_w)
    s = np.array([95.0, 105.0])
    got = zeldovich_expectation(st, s, (0, 2), alpha_par=1.02, alpha_perp=0.99, n_mu=2)
    want = zeldovich_multipoles(ZeldovichFunctions(power), s, (0, 2), b1=b1, b2=b2,
                                f=float(cosmo.growth_rate(0.5)), alpha_par=1.02,
                                alpha_perp=0.99, n_mu=2)
    np.testing.assert_allclose(got, want, rtol=1e-12)
    fid = dataclasses.replace(cosmo, h=cosmo.h * 1.01)
    scale = cosmo.sound_horizon() * cosmo.h / (fid.sound_horizon() * fid.h)
    assert abs(scale - 1) > 1e-3
    shifted = zeldovich_expectation(st, s, (0, 2), alpha_par=1.02, alpha_perp=0.99,
                                    fiducial=fid, n_mu=2)
    want = zeldovich_multipoles(ZeldovichFunctions(power), s, (0, 2), b1=b1, b2=b2,
                                f=float(cosmo.growth_rate(0.5)), alpha_par=1.02 * scale,
                                alpha_perp=0.99 * scale, n_mu=2)
    np.testing.assert_allclose(shifted, want, rtol=1e-12)


def test_lagrangian_positions_inside_cells_are_uniform():
    # "cells": each galaxy starts at a uniform point of its node's cell (KS test against the
    # uniform distribution, scipy; common practice), so position - displacement is off the
    # lattice; "nodes" keeps the start points on the lattice nodes
    from scipy import stats

    from corrpipe.mocks.box import zeldovich_box
    from corrpipe.theory.linear_power import LinearPower
    from corrpipe.cosmology import preset

    power = LinearPower.eisenstein_hu(preset("planck2018"), z=2.0)
    args = (power, 400.0, 40, 2e-4, 2.0, 0.9, 11)
    cell = 10.0
    for mode in ("nodes", "cells"):
        box = zeldovich_box(*args, lagrangian_positions=mode, progress=False)
        q = np.mod(box.positions - box.displacement, 400.0) / cell
        frac = np.mod(q + 0.5, 1.0) - 0.5   # offset from the nearest node, in cells
        if mode == "nodes":
            assert np.max(np.abs(frac)) < 1e-6
        else:
            assert stats.kstest(frac.ravel() + 0.5, "uniform").pvalue > 1e-3
            assert np.max(np.abs(frac)) <= 0.5
