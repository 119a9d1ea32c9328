"""Linear power spectrum: EH98 transfer functions, normalisation, tabulated files and the
wiggle/no-wiggle split."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from corrpipe.cosmology import Cosmology
from corrpipe.errors import InputError
from corrpipe.theory.linear_power import (
    LinearPower,
    eh98_nowiggle_transfer,
    eh98_transfer,
    tophat_sigma,
)

# REFERENCES §1 cosmology: omega_m h^2 = 0.1424, omega_b h^2 = 0.02242, h = 0.6766.
H = 0.6766
OM = 0.1424 / H**2
OB = 0.02242 / H**2


def _cosmo() -> Cosmology:
    return Cosmology(h=H, omega_m=OM, omega_b=OB, n_s=0.9665, sigma8=0.8102)


def test_nowiggle_transfer_matches_formula_table():
    # Eisenstein & Hu 1998 eqs. 28-31 with s from eq. 26; check values REFERENCES §1 [COMP].
    k = np.array([0.001, 0.01, 0.05, 0.1, 0.2, 0.5, 1.0])
    expected = np.array([0.992104, 0.786794, 0.279445, 0.134015, 0.054997, 0.014195,
                         0.004690])
    got = eh98_nowiggle_transfer(k, H, OM, OB, 2.7255)
    np.testing.assert_allclose(got, expected, rtol=2e-5, atol=1e-6)


def test_full_transfer_large_scales_and_zero_baryon_limit():
    # EH98: T -> 1 on large scales; with f_b -> 0 the general fit reduces to the CDM-only shape,
    # which the zero-baryon form T0 (Gamma = Omega_m h, REFERENCES §1 [COMP]) matches to ~1 %
    # (both are fits to the same CDM transfer function; tolerance from EH98's quoted accuracy
    # of a few per cent [from memory]).
    assert abs(eh98_transfer(np.array([1e-5]), H, OM, OB)[0] - 1.0) < 1e-3
    k = np.array([0.01, 0.1, 1.0])
    t0 = np.array([0.788324, 0.172909, 0.006761])
    np.testing.assert_allclose(eh98_transfer(k, H, 0.311061, 1e-7, 2.7255), t0, rtol=0.01)


def test_wiggles_oscillate_about_the_smooth_form():
    # EH98 fig. 2 [from memory]: T/T_nw oscillates by a few per cent around 1 on BAO scales.
    k = np.linspace(0.03, 0.3, 400)
    ratio = eh98_transfer(k, H, OM, OB) / eh98_nowiggle_transfer(k, H, OM, OB)
    assert 0.01 < np.ptp(ratio) / 2 < 0.1
    assert abs(np.mean(ratio) - 1.0) < 0.02
    sign_changes = np.sum(np.diff(np.sign(ratio - np.mean(ratio))) != 0)
    assert 6 <= sign_changes <= 14  # k r_s / pi ~ (0.3 - 0.03) * 102 / pi ~ 9 half-periods


def test_tophat_sigma_against_quad():
    # scipy.integrate.quad reference of sigma^2(R) = int dk k^2 P W^2 / (2 pi^2).
    k = np.geomspace(1e-5, 1e3, 8192)
    pk = 2e4 * k / (1.0 + (k / 0.02) ** 3)

    def integrand(x):
        w = 3.0 * (np.sin(x * 8) - x * 8 * np.cos(x * 8)) / (x * 8) ** 3
        return x**2 * 2e4 * x / (1 + (x / 0.02) ** 3) * w * w / (2 * np.pi**2)

    ref = np.sqrt(quad(integrand, 1e-5, 50, limit=500)[0])
    assert tophat_sigma(k, pk, 8.0) == pytest.approx(ref, rel=1e-4)


def test_sigma8_and_growth():
    # By construction sigma_8(z=0) is the cosmology's; P(z) = D(z)^2 P(0) (linear theory).
    c = _cosmo()
    p0 = LinearPower.eisenstein_hu(c, 0.0)
    p1 = LinearPower.eisenstein_hu(c, 1.0)
    assert p0.sigma(8.0) == pytest.approx(0.8102, rel=1e-6)
    assert p1.sigma(8.0) / p0.sigma(8.0) == pytest.approx(float(c.growth_factor(1.0)), rel=1e-6)


def test_A_s_normalisation_against_planck_sigma8():
    # Planck 2018 VI, Table 2 (TT,TE,EE+lowE+lensing+BAO) [from memory]: ln(1e10 A_s) = 3.047
    # and sigma_8 = 0.8102. EH98 (~1-2 % accuracy) with massless neutrinos (Planck: 0.06 eV,
    # which lowers sigma_8 by ~1-2 %) should land within 4 %.
    p = LinearPower.eisenstein_hu(_cosmo(), 0.0, normalisation="A_s", A_s=np.exp(3.047) * 1e-10)
    assert p.sigma(8.0) == pytest.approx(0.8102, rel=0.04)


def test_tabulated_file_and_nowiggle_split(tmp_path):
    # A tabulated EH98 spectrum read back: same power; its Gaussian-smoothed no-wiggle part
    # (Vlah et al. 2016 app. A method [from memory]) agrees with the analytic EH98 no-wiggle
    # form (EH98 §4.2) to 3 % over the BAO range (the analytic no-wiggle form itself departs
    # from the mean of the full EH98 fit by up to ~2 %), and the wiggles survive the split.
    c = _cosmo()
    eh = LinearPower.eisenstein_hu(c, 0.0)
    k_tab = np.geomspace(1e-4, 10.0, 600)
    path = tmp_path / "pk.txt"
    np.savetxt(path, np.column_stack([k_tab, eh(k_tab)]), header="k [h/Mpc]  P [(Mpc/h)^3]")
    tab = LinearPower.from_file(path, c)
    k = np.geomspace(0.02, 0.4, 100)
    np.testing.assert_allclose(tab(k), eh(k), rtol=1e-3)  # log-log interpolation of 600 rows
    np.testing.assert_allclose(tab.nowiggle(k), eh.nowiggle(k) * np.mean(
        tab.nowiggle(k) / eh.nowiggle(k)), rtol=0.03)
    wig_tab = tab(k) / tab.nowiggle(k) - 1
    wig_eh = eh(k) / eh.nowiggle(k) - np.mean(eh(k) / eh.nowiggle(k))
    assert np.corrcoef(wig_tab, wig_eh)[0, 1] > 0.9  # eh ratio keeps a ~2 % smooth trend


def test_file_errors(tmp_path):
    # common practice: bad tables give InputError naming the file and the problem
    c = _cosmo()
    with pytest.raises(InputError, match="does not exist"):
        LinearPower.from_file(tmp_path / "none.txt", c)
    one = tmp_path / "one.txt"
    np.savetxt(one, np.geomspace(1e-3, 1, 50))
    with pytest.raises(InputError, match="column"):
        LinearPower.from_file(one, c)
    unsorted = tmp_path / "unsorted.txt"
    k = np.geomspace(1e-4, 10, 50)[::-1]
    np.savetxt(unsorted, np.column_stack([k, k]))
    with pytest.raises(InputError, match="increase"):
        LinearPower.from_file(unsorted, c)
    narrow = tmp_path / "narrow.txt"
    k = np.geomspace(0.01, 0.3, 50)
    np.savetxt(narrow, np.column_stack([k, k]))
    with pytest.raises(InputError, match="0.005-0.5"):
        LinearPower.from_file(narrow, c)


def test_template_sound_horizon_is_eh98_eq6():
    # EH98 eq. 6 with the eq. 4 drag redshift: 151.035 Mpc (REFERENCES §1 [COMP]); this is the
    # scale the EH98 wiggles sit at, and the r_d the fit converts alphas with.
    assert LinearPower.eisenstein_hu(_cosmo(), 0.0).sound_horizon == pytest.approx(151.035,
                                                                                 rel=2e-5)
