"""Fiducial cosmology: distances against astropy.cosmology, growth, sound horizon, presets.

References: astropy.cosmology (reference library, objects built independently in each test);
Eisenstein & Hu 1998 (ApJ 496, 605) eq. 4 with the numerical sound-horizon integral and the
Planck 2018 VI (A&A 641, A6, Table 2 [from memory]) r_drag, as listed in REFERENCES §1-2 and §7.
"""

import numpy as np
import pytest
from astropy import cosmology as ac
from scipy.integrate import quad

from corrpipe.cosmology import (
    PRESETS,
    Cosmology,
    _sound_horizon_integral,
    cartesian_to_sky,
    preset,
    sky_to_cartesian,
)
from corrpipe.errors import ConfigError, InputError

Z = np.concatenate([[0.0, 1e-4], np.linspace(0.01, 3.0, 300), [4.5, 7.0, 9.99]])
C_KM_S = 299792.458


def _check_distances(ours: Cosmology, ref, h: float, rtol: float = 1e-6) -> None:
    z = Z[1:]
    np.testing.assert_allclose(ours.comoving_distance(z), ref.comoving_distance(z).value * h,
                               rtol=rtol)
    np.testing.assert_allclose(ours.transverse_distance(z),
                               ref.comoving_transverse_distance(z).value * h, rtol=rtol)
    np.testing.assert_allclose(ours.hubble_distance(z), C_KM_S / ref.H(z).value * h, rtol=rtol)
    dv = np.cbrt(z * ref.comoving_transverse_distance(z).value ** 2 * C_KM_S / ref.H(z).value)
    np.testing.assert_allclose(ours.volume_distance(z), dv * h, rtol=rtol)


def test_flat_lcdm_distances_match_astropy():
    # astropy.cosmology.FlatLambdaCDM reference; done-when tolerance 1e-6 relative
    c = Cosmology(h=0.6766, omega_m=0.3111, omega_b=0.049)
    ref = ac.FlatLambdaCDM(H0=67.66, Om0=0.3111, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    _check_distances(c, ref, 0.6766)
    assert c.comoving_distance(0.0) == 0.0


def test_table_interpolation_is_below_1e7():
    # astropy.cosmology.FlatLambdaCDM reference; design target 1e-7 for the table
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045)
    ref = ac.FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    z = np.linspace(0.0005, 9.9, 997)  # off-grid points
    np.testing.assert_allclose(c.comoving_distance(z), ref.comoving_distance(z).value * 0.7,
                               rtol=1e-7)


def test_w0wa_distances_match_astropy():
    # astropy.cosmology.Flatw0waCDM reference
    c = Cosmology(h=0.68, omega_m=0.30, omega_b=0.048, w0=-0.8, wa=-0.6)
    ref = ac.Flatw0waCDM(H0=68.0, Om0=0.30, w0=-0.8, wa=-0.6, Tcmb0=2.7255, Neff=3.046,
                         m_nu=0.0)
    _check_distances(c, ref, 0.68)


@pytest.mark.parametrize("ode", [0.6, 0.8])
def test_curved_distances_match_astropy(ode):
    # astropy.cosmology.LambdaCDM reference (no radiation, so Omega_k = 1 - Om - Ode exactly);
    # ode = 0.6 is open, 0.8 closed
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045, omega_k=1.0 - 0.3 - ode, T_cmb=0.0)
    ref = ac.LambdaCDM(H0=70.0, Om0=0.3, Ode0=ode, Tcmb0=0.0)
    _check_distances(c, ref, 0.7)


def test_curved_w0wa_with_radiation_keeps_requested_curvature():
    # astropy.cosmology.w0waCDM reference: its Ok0 is derived from the other densities
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045, omega_k=0.05, w0=-0.9, wa=0.2)
    model = c.astropy()
    assert model.Ok0 == pytest.approx(0.05, abs=1e-12)
    ref = ac.w0waCDM(H0=70.0, Om0=0.3, Ode0=model.Ode0, w0=-0.9, wa=0.2, Tcmb0=2.7255,
                     Neff=3.046, m_nu=0.0)
    _check_distances(c, ref, 0.7)


def test_distances_at_published_bao_redshifts():
    # REFERENCES §7 model distances [COMP, astropy agrees to <1e-3 Mpc]: flat LCDM,
    # Om = 0.311061, h = 0.6766, no radiation; values in Mpc
    c = Cosmology(h=0.6766, omega_m=0.311061, omega_b=0.049, T_cmb=0.0)
    h = 0.6766
    assert c.transverse_distance(0.38) / h == pytest.approx(1528.413, abs=2e-3)
    assert c.hubble_distance(0.38) / h == pytest.approx(3610.058, abs=2e-3)
    assert c.volume_distance(0.38) / h == pytest.approx(1474.324, abs=2e-3)
    assert c.volume_distance(0.61) / h == pytest.approx(2167.216, abs=2e-3)
    assert c.volume_distance(0.35) / h == pytest.approx(1373.295, abs=2e-3)


def test_table_extends_beyond_default_range():
    # astropy.cosmology.FlatLambdaCDM reference at high redshift
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045)
    ref = ac.FlatLambdaCDM(H0=70.0, Om0=0.3, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    for z in (50.0, 1100.0):
        assert c.comoving_distance(z) == pytest.approx(ref.comoving_distance(z).value * 0.7,
                                                       rel=1e-6)


def test_redshift_at_inverts_comoving_distance():
    # inverse of astropy's chi(z) (astropy.cosmology reference)
    c = preset("planck2018")
    ref = c.astropy()
    z = np.linspace(0.001, 5.0, 401)
    chi = ref.comoving_distance(z).value * c.h
    np.testing.assert_allclose(c.redshift_at(chi), z, rtol=1e-8)
    assert c.redshift_at(c.comoving_distance(30.0)) == pytest.approx(30.0, rel=1e-8)


def test_bad_redshift_is_rejected_with_count():
    # common practice: negative or non-finite redshift has no distance
    c = preset("planck2018")
    with pytest.raises(InputError, match="2 bad value"):
        c.comoving_distance([0.1, -0.2, np.nan])


def test_sky_cartesian_round_trip():
    # geometric identity (common practice): the conversion inverts exactly
    rng = np.random.default_rng(7)
    n = 2000
    ra = rng.uniform(0, 360, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    z = rng.uniform(0.01, 2.0, n)
    c = preset("planck2018")
    xyz = sky_to_cartesian(ra, dec, z, c)
    np.testing.assert_allclose(np.linalg.norm(xyz, axis=1), c.comoving_distance(z), rtol=1e-13)
    ra2, dec2, z2 = cartesian_to_sky(xyz, c)
    dra = (ra2 - ra + 180.0) % 360.0 - 180.0
    np.testing.assert_allclose(dra, 0.0, atol=1e-9)
    np.testing.assert_allclose(dec2, dec, atol=1e-9)
    np.testing.assert_allclose(z2, z, rtol=1e-9)
    assert np.all((ra2 >= 0) & (ra2 < 360))


def test_sky_to_cartesian_axes():
    # convention (common practice): x towards RA=0, Dec=0; z towards the north pole
    c = preset("round")
    chi = c.comoving_distance(0.5)
    xyz = sky_to_cartesian([0.0, 90.0, 10.0], [0.0, 0.0, 90.0], [0.5, 0.5, 0.5], c)
    np.testing.assert_allclose(xyz, [[chi, 0, 0], [0, chi, 0], [0, 0, chi]], atol=1e-9 * chi)


@pytest.mark.parametrize("ok", [0.0, 0.1, -0.1])
def test_growth_matches_heath_integral_without_radiation(ok):
    # Heath 1977 (MNRAS 179, 351) [from memory]: for matter + curvature + Lambda,
    # D(a) proportional to E(a) int_0^a da' / (a' E(a'))^3; check with scipy.integrate.quad
    om, h = 0.3, 0.7
    c = Cosmology(h=h, omega_m=om, omega_b=0.045, T_cmb=0.0, omega_k=ok)

    def e(a):
        return np.sqrt(om / a**3 + ok / a**2 + 1 - om - ok)

    def heath(a):
        return e(a) * quad(lambda x: 1.0 / (x * e(x)) ** 3, 0.0, a, epsrel=1e-12)[0]

    zs = np.array([0.0, 0.5, 1.0, 3.0, 9.0])
    expect = np.array([heath(1 / (1 + z)) for z in zs]) / heath(1.0)
    np.testing.assert_allclose(c.growth_factor(zs), expect, rtol=1e-7)
    # f = dlnD/dlna from the same integral: f = -3/2 Om a^-3/E^2 ... via finite difference
    a, eps = 1 / 1.5, 1e-5
    f_num = (np.log(heath(a * np.exp(eps))) - np.log(heath(a * np.exp(-eps)))) / (2 * eps)
    assert c.growth_rate(0.5) == pytest.approx(f_num, rel=1e-6)


def test_growth_rate_close_to_linder_gamma():
    # Linder 2005 (PRD 72, 043529) [from memory]: f ~ Omega_m(z)^0.55 to ~0.5 % in LCDM
    c = preset("planck2018")
    model = c.astropy()
    for z in (0.0, 0.5, 1.0, 2.0):
        assert c.growth_rate(z) == pytest.approx(model.Om(z) ** 0.55, rel=6e-3)
    assert c.growth_factor(0.0) == pytest.approx(1.0, abs=1e-14)


def test_sound_horizon_integral_check_value():
    # REFERENCES §1 [COMP]: EH98 eq. 4 z_d = 1020.78 and the numerical integral give
    # r_s = 150.698 Mpc for omega_m h^2 = 0.1424, omega_b h^2 = 0.02242, h = 0.6766
    h = 0.6766
    c = Cosmology(h=h, omega_m=0.1424 / h**2, omega_b=0.02242 / h**2)
    assert c.drag_redshift() == pytest.approx(1020.78, abs=0.006)
    assert c.sound_horizon() == pytest.approx(150.698, abs=1e-3)
    # the same integral stopped at Planck's z_drag = 1059.94: 147.059 Mpc (REFERENCES §1)
    r = _sound_horizon_integral(c.astropy(), 1059.94, h, c.omega_b)
    assert r == pytest.approx(147.059, abs=1e-3)


def test_sound_horizon_against_planck_with_eh98_offset():
    # Planck 2018 VI Table 2 (TT,TE,EE+lowE+lensing): r_drag = 147.09 +- 0.26 Mpc at
    # z_drag = 1059.94 [from memory]. EH98-based r_d is expected ~2.7 % high (REFERENCES §1);
    # accept 1.5-3.5 %. At Planck's own z_drag the integral must agree to 0.3 % (REFERENCES §1:
    # 146.937 Mpc, 0.1 % low from simplified physics).
    c = preset("planck2018-cmb")
    ratio = c.sound_horizon() / 147.09
    assert 1.015 < ratio < 1.035
    h = 0.6736  # REFERENCES §1 uses Omega_m h^2 = 0.1430 exactly for this check
    c = Cosmology(h=h, omega_m=0.1430 / h**2, omega_b=0.02237 / h**2)
    r = _sound_horizon_integral(c.astropy(), 1059.94, h, c.omega_b)
    assert r == pytest.approx(146.937, abs=2e-3)
    assert r == pytest.approx(147.09, rel=3e-3)


def test_user_sound_horizon_overrides():
    # common practice: a Boltzmann-code r_d may be given by the user
    c = Cosmology(r_d=147.09)
    assert c.sound_horizon() == 147.09
    d = c.distance_ratios(0.5)
    assert d["DV_over_rd"] == pytest.approx(c.volume_distance(0.5) / c.h / 147.09, rel=1e-14)
    assert d["DM_over_rd"] == pytest.approx(c.transverse_distance(0.5) / c.h / 147.09,
                                            rel=1e-14)


def test_presets_and_config():
    # Planck 2018 VI Table 2 [from memory] parameter values for the presets
    p = preset("planck2018")
    assert (p.h, p.omega_m, p.n_s, p.sigma8) == (0.6766, 0.3111, 0.9665, 0.8102)
    assert p.omega_b * p.h**2 == pytest.approx(0.02242, rel=1e-12)
    q = preset("planck2018-cmb")
    assert q.omega_b * q.h**2 == pytest.approx(0.02237, rel=1e-12) and q.h == 0.6736
    c = Cosmology.from_config({"preset": "planck2018-cmb", "w0": -0.9})
    assert c.w0 == -0.9 and c.h == 0.6736
    assert Cosmology.from_config({}) == Cosmology()
    assert set(PRESETS) >= {"planck2018", "planck2018-cmb"}


@pytest.mark.parametrize(
    "mapping, words",
    [
        ({"preset": "nonsense"}, "known presets"),
        ({"hubble": 0.7}, "unknown key"),
        ({"h": 5.0}, "outside the allowed range"),
        ({"omega_m": 0.04, "omega_b": 0.05}, "smaller than omega_m"),
        ({"sigma8": "high"}, "must be a number"),
    ],
)
def test_bad_config_gives_clear_error(mapping, words):
    # common practice: config errors name the key and the allowed values
    with pytest.raises(ConfigError, match=words):
        Cosmology.from_config(mapping)


def test_sound_horizon_without_radiation_needs_user_value():
    # common practice: no photons means no acoustic horizon to integrate
    with pytest.raises(ConfigError, match="give r_d"):
        Cosmology(T_cmb=0.0).sound_horizon()


def test_cosmology_settings_table():
    # Planck 2018 VI Table 2 [from memory] preset values; overrides replace single fields
    from corrpipe.cosmology import CosmologySettings
    from corrpipe.config import validate_section
    from pathlib import Path

    s = validate_section(CosmologySettings, {"preset": "planck2018-cmb", "r_d": 147.09},
                         "cosmology", "test.toml", Path("."))
    c = s.build()
    assert c.h == 0.6736 and c.sound_horizon() == 147.09
    with pytest.raises(ConfigError, match="smaller than omega_m"):
        validate_section(CosmologySettings, {"omega_b": 0.4}, "cosmology", "t.toml", Path("."))
    with pytest.raises(ConfigError, match="preset"):
        validate_section(CosmologySettings, {"preset": "nope"}, "cosmology", "t.toml", Path("."))


def test_growth_rate_w0wa_close_to_linder_gamma():
    # Linder 2005 (PRD 72, 043529) [from memory]: gamma = 0.55 + 0.05 [1 + w(z=1)] for
    # w(z=1) >= -1, accurate to a few 0.1 % in f; we allow 0.5 %
    c = Cosmology(w0=-0.9, wa=0.1, T_cmb=0.0)
    model = c.astropy()
    gamma = 0.55 + 0.05 * (1.0 + model.w(1.0))
    for z in (0.0, 0.5, 1.0, 2.0):
        assert c.growth_rate(z) == pytest.approx(model.Om(z) ** gamma, rel=5e-3)
