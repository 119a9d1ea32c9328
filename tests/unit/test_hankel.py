"""FFTLog Hankel transforms (scipy.fft.fht) against quadrature and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import simpson
from scipy.special import spherical_jn

from corrpipe.cosmology import Cosmology
from corrpipe.errors import InputError
from corrpipe.theory.hankel import pk_to_xi
from corrpipe.theory.linear_power import LinearPower


@pytest.mark.parametrize("ell", [0, 2, 4])
def test_fht_against_direct_quadrature(ell):
    # Direct numerical quadrature (scipy.integrate.simpson of k^2 P j_ell(ks) e^{-k^2}, with
    # scipy.special.spherical_jn) of the same EH98 P(k); brief target 1e-3 relative to the
    # largest |xi_ell| over 20-200 Mpc/h (zero crossings make a pointwise ratio meaningless).
    lp = LinearPower.eisenstein_hu(Cosmology(), 0.0)
    s = np.linspace(20.0, 200.0, 12)
    xi = pk_to_xi(lp.k, lp.power, ell, s, damping=1.0)
    k = np.linspace(1e-6, 7.0, 200001)
    f = k**2 * lp(k) * np.exp(-(k**2))
    ref = np.array([simpson(f * spherical_jn(ell, k * si), x=k) for si in s])
    ref *= (-1) ** (ell // 2) / (2 * np.pi**2)
    assert np.max(np.abs(xi - ref)) < 1e-3 * np.max(np.abs(ref))


def test_gaussian_closed_forms():
    # int_0^inf k^(l+2) e^(-a k^2) j_l(k r) dk = sqrt(pi) r^l / (2^(l+2) a^(l+3/2)) e^(-r^2/4a)
    # (Gradshteyn & Ryzhik 6.631.4 [from memory]; for l = 0 it is the 3-D Fourier pair of a
    # Gaussian, common practice).
    a = 12.5  # (Mpc/h)^2, i.e. sigma = 5 Mpc/h
    k = np.geomspace(1e-5, 1e3, 4096)
    r = np.linspace(1.0, 35.0, 30)
    for ell in (0, 2):
        pk = k**ell * np.exp(-a * k**2)
        xi = pk_to_xi(k, pk, ell, r, damping=0.0)
        exact = (-1) ** (ell // 2) / (2 * np.pi**2) * np.sqrt(np.pi) * r**ell \
            / (2 ** (ell + 2) * a ** (ell + 1.5)) * np.exp(-(r**2) / (4 * a))
        np.testing.assert_allclose(xi, exact, atol=1e-8 * np.max(np.abs(exact)))


def test_bad_grid():
    # common practice: FFTLog needs log-spaced input
    with pytest.raises(InputError, match="ln k"):
        pk_to_xi(np.linspace(0.01, 1, 64), np.ones(64), 0, [50.0])
