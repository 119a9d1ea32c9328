"""Line interlopers: mapping against astropy, the fit term against a direct computation, the
f = 0 limit, and one-line errors for bad input.

References: astropy.cosmology (independent distances, built in each test); REFERENCES §15
(mapping formulas and the [COMP] check values for [O II] read as Ly-alpha); vacuum/air
wavelengths of H-alpha (6564.61 / 6562.80 A) and [O III] 5007 (5008.24 / 5006.84 A) [from
memory; standard atomic data]; Kaiser 1987 (beta-polynomial of the interloper model).
"""

from __future__ import annotations

import numpy as np
import pytest
from astropy import cosmology as ac

from corrpipe.cosmology import Cosmology
from corrpipe.errors import ConfigError, InputError
from corrpipe.fit.run import build_likelihood
from corrpipe.fit.settings import FitSettings
from corrpipe.theory.interlopers import (REST_WAVELENGTHS, air_to_vacuum, assigned_redshift,
                                         line_mapping, rest_wavelength, vacuum_to_air)
from corrpipe.theory.template import BAOTemplate, multipole_weights

C_KM_S = 299792.458


def _pair():
    ours = Cosmology(h=0.6766, omega_m=0.3111, omega_b=0.049)
    ref = ac.FlatLambdaCDM(H0=67.66, Om0=0.3111, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    return ours, ref


@pytest.mark.parametrize("target,interloper,z", [("Lya", "OII", 2.4), ("Lya", "OII", 3.14),
                                                 ("OIII5007", "Ha", 1.2),
                                                 ("OIII5007", "Hb", 1.3), ("Ha", "OIII5007", 1.0)])
def test_mapping_matches_astropy_finite_differences(target, interloper, z):
    # Independent route: astropy distances; gamma_par as the ratio of comoving-distance
    # differences of a small true-redshift interval and its image under the wavelength map
    # (central differences, truncation ~1e-9). Tolerance 1e-6 (issue requirement).
    ours, ref = _pair()
    m = line_mapping(ours, target, interloper, z)
    lam_t, lam_i = REST_WAVELENGTHS[target], REST_WAVELENGTHS[interloper]
    z_i = (1 + z) * lam_t / lam_i - 1
    assert abs(float(m.z_true) - z_i) < 1e-12
    dm = ref.comoving_transverse_distance([z, z_i]).value
    assert abs(float(m.gamma_perp) / (dm[0] / dm[1]) - 1) < 1e-6
    dz = 1e-4
    zi = np.array([z_i - dz, z_i + dz])
    za = (1 + zi) * lam_i / lam_t - 1
    chi_t = ref.comoving_distance(za).value
    chi_i = ref.comoving_distance(zi).value
    fd = (chi_t[1] - chi_t[0]) / (chi_i[1] - chi_i[0])
    assert abs(float(m.gamma_par) / fd - 1) < 1e-6


def test_mapping_reference_values_and_wavelength_ratio():
    # REFERENCES §15 [COMP] (flat LCDM Omega_m = 0.3111, h = 0.6766, no radiation):
    # [O II] as Ly-alpha at z_t = 3.14 -> z_i = 0.350, gamma_perp 4.680, gamma_par 0.775;
    # at z_t = 2.40 -> z_i = 0.109, gamma_perp 12.48, gamma_par 0.900 (quoted to 3-4 digits).
    c = Cosmology(h=0.6766, omega_m=0.3111, omega_b=0.049, T_cmb=0.0, r_d=147.0)
    m = line_mapping(c, "Lya", "[O II]", [3.14, 2.40])
    np.testing.assert_allclose(m.z_true, [0.350, 0.109], atol=1e-3)
    # half a unit of the last quoted digit
    assert abs(m.gamma_perp[0] - 4.680) <= 5e-4 and abs(m.gamma_perp[1] - 12.48) <= 5e-3
    np.testing.assert_allclose(m.gamma_par, [0.775, 0.900], atol=5e-4)
    # assigned z against the wavelength ratio: (1 + z_a) / (1 + z_i) = lambda_i / lambda_t
    np.testing.assert_allclose((1 + m.z_assigned) / (1 + m.z_true),
                               REST_WAVELENGTHS["OII"] / REST_WAVELENGTHS["Lya"], rtol=1e-14)
    np.testing.assert_allclose(assigned_redshift(m.z_true, REST_WAVELENGTHS["OII"],
                                                 REST_WAVELENGTHS["Lya"]), [3.14, 2.40],
                               rtol=1e-14)


def test_air_and_vacuum_wavelengths():
    # H-alpha 6562.80 A (air) / 6564.61 A (vacuum); [O III] 5006.84 / 5008.24 [from memory];
    # Morton 2000 index, so agreement to ~0.02 A.
    assert abs(air_to_vacuum(6562.80) - 6564.61) < 0.02
    assert abs(float(vacuum_to_air(5008.24)) - 5006.84) < 0.02
    assert abs(rest_wavelength(6562.80, "air") - REST_WAVELENGTHS["Ha"]) < 0.02
    assert abs(air_to_vacuum(float(vacuum_to_air(4862.68))) - 4862.68) < 1e-8
    assert rest_wavelength("H-alpha") == rest_wavelength("Ha") == rest_wavelength("6564.61")


def test_bad_lines_are_one_line_errors():
    # issue 17: unknown line name; a line bluer than the target with no valid redshift
    c = Cosmology()
    with pytest.raises(InputError, match="unknown emission line 'Hgamma'.*known lines"):
        rest_wavelength("Hgamma")
    # Hb read as [O III] 5007 needs z_true = (1 + z) 5008.24/4862.68 - 1 > 0: fine at 0.5,
    # but Ha read as Ly-alpha at z = 3 would need z_true = 4 * 1215.67/6564.61 - 1 < 0
    with pytest.raises(InputError, match="cannot be assigned z = 3.*true redshift"):
        line_mapping(c, "Lya", "Ha", 3.0)
    with pytest.raises(InputError, match="another line"):
        line_mapping(c, "Ha", "Ha", 1.0)
    for kw, match in [(dict(target_line="OIII5007"), "interloper_line is empty"),
                      (dict(target_line="OIII5007", interloper_line="Hz"), "unknown emission"),
                      (dict(target_line="OIII5007", interloper_line="Ha",
                            interloper_fraction=0.6), "must be below")]:
        with pytest.raises(ConfigError, match=match) as info:
            FitSettings(**kw).validate()
        assert "\n" not in str(info.value)


S = np.arange(42.5, 160.0, 5.0)
Z_EFF = 1.2


def _settings(**kw):
    base = dict(target_line="OIII5007", interloper_line="Ha", interloper_fraction=0.05,
                interloper_bias=1.3, sigma_par=2.0, sigma_perp=2.0, beta=0.45)
    base.update(kw)
    return FitSettings(**base)


def _like(settings, data=None):
    cov = np.diag(np.tile(1e-3 * 100.0 / S, 2) ** 2)
    d = np.zeros(2 * S.size) if data is None else data
    return build_likelihood(S, d, cov, (0, 2), cosmology=Cosmology(), z_eff=Z_EFF,
                            settings=settings)


def test_interloper_term_matches_direct_computation():
    # The precomputed term against an independent evaluation: the interloper template at
    # z_true with B = b^2 and beta = f_i / b (Kaiser 1987), dilated by 1/gamma through the
    # template's own multipoles method (Xu et al. 2013 mapping, REFERENCES §7, §15).
    like = _like(_settings())
    term = like.terms[0]
    g = term.growth_rate
    assert abs(g - float(Cosmology().growth_rate(float(term.mapping.z_true)))) < 1e-12
    b = 1.7
    tpl: BAOTemplate = term.template
    direct = tpl.multipoles(like.s, 1 / term.gamma_par, 1 / term.gamma_perp, (0, 2), B=b * b,
                            beta=g / b, sigma_par=term.damping[0], sigma_perp=term.damping[1],
                            sigma_s=term.damping[2])
    phys = dict(like.physical(like.start()), interloper_bias=b, interloper_fraction=0.1)
    np.testing.assert_allclose(term.interloper_model(phys), direct.ravel(), rtol=1e-12,
                               atol=1e-16)
    t = like.template_model(phys)
    np.testing.assert_allclose(like.model(phys), 0.81 * t + 0.01 * direct.ravel(), rtol=1e-12,
                               atol=1e-16)
    # the fit ells and quadrature are those of the likelihood
    mu, w = multipole_weights((0, 2), like.settings.n_mu)
    np.testing.assert_array_equal(mu, like._mu)


def test_zero_fraction_reproduces_the_plain_fit_bitwise():
    # f = 0: (1 - 0)^2 t + 0 = t exactly (IEEE arithmetic; internal consistency)
    rng = np.random.default_rng(4)
    data = rng.normal(0, 1e-3, 2 * S.size)
    with_term = _like(_settings(), data)
    plain = _like(_settings(target_line="", interloper_line=""), data)
    theta_plain = np.array([1.01, 0.99, 2.3, 0.5])
    theta_term = np.append(theta_plain, 0.0)
    assert with_term.names == plain.names + ("interloper_fraction",)
    assert with_term.chi2(theta_term) == plain.chi2(theta_plain)
    assert np.array_equal(with_term.full_model(theta_term), plain.full_model(theta_plain))


def test_term_parameters_and_priors():
    # flat prior on f over [0, max]; Gaussian prior when a width is given; bias free with a
    # Gaussian prior; the settings count what the likelihood samples (Percival et al. 2014 m1)
    st = _settings(interloper_fraction_width=0.02, interloper_bias_width=0.3)
    like = _like(st)
    assert like.names[-2:] == ("interloper_fraction", "interloper_bias")
    assert st.n_sampled_parameters == like.n_dim
    p_f = like.parameters[-2]
    assert p_f.low == 0.0 and p_f.high == st.interloper_fraction_max
    assert p_f.log_prior(0.07) == pytest.approx(-0.5 * (0.02 / 0.02) ** 2)
    flat = _like(_settings())
    assert flat.parameters[-1].log_prior(0.3) == 0.0
    assert flat.parameters[-1].log_prior(0.6) == -np.inf


def test_noise_free_recovery_with_known_fraction():
    # Data made with the model at f = 0.08 and alphas (1.02, 0.99); with a tight Gaussian
    # prior on f at its true value the fit returns the dilations to < 0.002 (self-consistency)
    from corrpipe.fit.run import best_fit

    st = _settings(interloper_fraction=0.08, interloper_fraction_width=0.005,
                   beta_prior_width=0.0, s_min=40.0, s_max=160.0)
    gen = _like(st)
    phys = dict(gen.physical(gen.start()), alpha_par=1.02, alpha_perp=0.99, B=3.0,
                interloper_fraction=0.08)
    data = gen.model(phys)
    cov = np.diag(np.tile(1e-3 * 100.0 / S, 2) ** 2) * 1e-6
    like = build_likelihood(S, data, cov, (0, 2), cosmology=Cosmology(), z_eff=Z_EFF,
                            settings=st)
    p = like.physical(best_fit(like))
    assert abs(p["alpha_par"] - 1.02) < 0.002 and abs(p["alpha_perp"] - 0.99) < 0.002


def test_fit_reports_fraction_and_dilation_shift(tmp_path):
    # The fit's summary (what summary.json holds) carries the posterior of f and the shift of
    # the dilations against the same fit without the term; the shift equals the difference of
    # two independent best fits (internal consistency; short chain, no convergence claimed).
    from corrpipe.fit import FitResult, fit_multipoles
    from corrpipe.fit.run import best_fit

    st = _settings(interloper_fraction=0.05, interloper_fraction_width=0.03, n_walkers=12,
                   max_steps=200, check_every=100, profile_points=0, s_min=40.0, s_max=160.0)
    gen = _like(st)
    phys = dict(gen.physical(gen.start()), alpha_par=1.01, alpha_perp=0.995, B=3.0,
                interloper_fraction=0.08)
    data = gen.model(phys) + np.random.default_rng(2).normal(0, 2e-4, 2 * S.size)
    cov = np.diag(np.full(2 * S.size, 2e-4 ** 2))
    result = fit_multipoles(S, data, cov, (0, 2), cosmology=Cosmology(), z_eff=Z_EFF,
                            settings=st, progress=False, seed=3)
    out = result.to_dict()
    assert "interloper_fraction" in out["summary"]
    inter = out["diagnostics"]["interlopers"]
    plain = build_likelihood(S, data, cov, (0, 2), cosmology=Cosmology(), z_eff=Z_EFF,
                             settings=_settings(target_line="", interloper_line="",
                                                s_min=40.0, s_max=160.0))
    p = plain.physical(best_fit(plain))
    assert abs(inter["best_fit_without_term"]["alpha_par"] - p["alpha_par"]) < 1e-5
    assert abs(inter["shift"]["alpha_par"] - (inter["best_fit"]["alpha_par"] - p["alpha_par"])) \
        < 1e-5
    assert abs(inter["mapping"]["gamma_perp"] - 1.537) < 1e-3
    assert "interloper fraction" in result.text_summary()
    # the diagnostics survive the HDF5 round trip of the fit stage
    import h5py

    with h5py.File(tmp_path / "fit.h5", "w") as h5:
        result.to_hdf5(h5.create_group("fit"))
    with h5py.File(tmp_path / "fit.h5", "r") as h5:
        back = FitResult.from_hdf5(h5["fit"])
    assert back.diagnostics["interlopers"]["shift"] == pytest.approx(inter["shift"])
