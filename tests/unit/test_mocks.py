"""Unit tests of corrpipe.mocks: fields, box generators, survey carving, dilation, files."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from astropy.table import Table
from scipy import integrate, stats

from corrpipe import mesh
from corrpipe.cosmology import Cosmology
from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.footprint import BoxFootprint, SkyBox
from corrpipe.mocks import (BoxMock, MockSettings, carve_survey, clipped_bias_moments,
                            clipped_linear_bias, expected_dilation, lagrangian_bias_for, lognormal_box,
                            survey_randoms, tabulated_nz, write_mocks, write_sky_catalogue,
                            zeldovich_box)
from corrpipe.mocks.fields import (gaussian_field_fourier, lognormal_gaussian_power,
                                   power_on_mesh, white_noise_fourier)


def toy_power(k):
    """Power law times a Gaussian cut-off, (Mpc/h)^3 (an analytic test spectrum)."""
    k = np.asarray(k, dtype=float)
    return 2.0e4 * (k / 0.05) * np.exp(-(k / 0.15) ** 2) / (1 + (k / 0.05) ** 2)


FLAT = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045, n_s=0.96, sigma8=0.8, r_d=147.0)


# ---------------------------------------------------------------- fields

@pytest.mark.parametrize("n, stretch", [(16, (1.0, 1.0, 1.0)), (15, (1.05, 0.97, 0.97)),
                                       (12, (0.9, 1.1, 1.02))])
def test_power_on_mesh_equals_direct_evaluation_on_every_mode(n, stretch):
    # The quadrant folding must give P(|k|) at every mode of the real-FFT layout, with |k|
    # from numpy.fft.fftfreq / rfftfreq directly (general library; even and odd n, stretched).
    box = 300.0
    kf = 2 * np.pi / box
    kx = np.fft.fftfreq(n, d=1.0 / n)[:, None, None] * kf / stretch[0]
    ky = np.fft.fftfreq(n, d=1.0 / n)[None, :, None] * kf / stretch[1]
    kz = np.fft.rfftfreq(n, d=1.0 / n)[None, None, :] * kf / stretch[2]
    k = np.sqrt(kx**2 + ky**2 + kz**2)
    direct = np.where(k > 0, toy_power(np.maximum(k, 1e-30)), 0.0) / np.prod(stretch)
    got = power_on_mesh(toy_power, n, box, stretch)
    assert got.shape == (n, n, n // 2 + 1)
    np.testing.assert_allclose(got, direct, rtol=1e-13, atol=0)


def test_lognormal_gaussian_power_inverts_the_log_transform():
    # Coles & Jones 1991 (REFERENCES sec. 9): exp(xi_G) - 1 = xi at every lag, here checked on
    # the mesh lags through FFTs. This mild target (xi(0) = 0.11) needs clipping of 7e-5 of the
    # variance, so the identity holds to 0.2% of max |xi|.
    n, box = 32, 400.0
    target = 0.25 * power_on_mesh(toy_power, n, box)
    p_gauss, clipped = lognormal_gaussian_power(target, box)
    assert clipped < 2e-4
    scale = n**3 / box**3
    xi = np.fft.irfftn(target, s=(n,) * 3, axes=(0, 1, 2)) * scale
    xi_g = np.fft.irfftn(p_gauss, s=(n,) * 3, axes=(0, 1, 2)) * scale
    np.testing.assert_allclose(np.expm1(xi_g), xi, atol=2e-3 * np.abs(xi).max())
    # REFERENCES sec. 9 [COMP] check values of ln(1 + xi)
    assert np.log1p([1.0, 0.1, 0.01, -0.5]) == pytest.approx(
        [0.693147, 0.0953102, 0.00995033, -0.693147], abs=1e-6)


def test_lognormal_rejects_xi_below_minus_one():
    # Coles & Jones 1991: 1 + xi = exp(xi_G) > 0, so xi <= -1 has no lognormal field.
    n, box = 16, 100.0
    target = np.zeros((n, n, n // 2 + 1))
    target[1, 0, 0] = 2.0e6  # one strong plane wave: xi = A cos(...) reaches -A
    with pytest.raises(InputError, match="xi"):
        lognormal_gaussian_power(target, box)


def test_power_on_mesh_stretch_is_the_coordinate_rescaling():
    # Fourier scaling theorem: delta_f(x) = delta_t(a x)  =>  P_f(k) = P_t(k / a) / (a1 a2 a3).
    n, box, a = 16, 300.0, (0.97, 0.97, 1.05)
    got = power_on_mesh(toy_power, n, box, stretch=a)
    kx, ky, kz = mesh.wavenumbers(n, box)
    kt = np.sqrt((kx / a[0]) ** 2 + (ky / a[1]) ** 2 + (kz / a[2]) ** 2)
    want = toy_power(np.where(kt > 0, kt, 1.0)) / np.prod(a)
    want[0, 0, 0] = 0.0
    np.testing.assert_allclose(got, want, rtol=1e-12)


def test_gaussian_field_has_target_power():
    # common practice: <V |F_k|^2 / n^6> = P(k); shell means within 4 sigma of cosmic variance.
    n, box = 64, 500.0
    pm = power_on_mesh(toy_power, n, box)
    field = mesh.to_real(gaussian_field_fourier(pm, white_noise_fourier(n,
                                                np.random.default_rng(3)), box), n)
    edges = np.linspace(0.1, 0.35, 6)
    res = mesh.power_multipoles(field, box, edges, ells=(0,), scheme=None)
    # expectation: P averaged over the modes of each shell (full k-space grid, numpy only)
    k1 = 2 * np.pi / box * np.fft.fftfreq(n, 1.0 / n)
    kk = np.sqrt(k1[:, None, None] ** 2 + k1[None, :, None] ** 2 + k1[None, None, :] ** 2)
    idx = np.digitize(kk.ravel(), edges) - 1
    ok = (idx >= 0) & (idx < edges.size - 1)
    want = (np.bincount(idx[ok], toy_power(kk.ravel()[ok]), minlength=5)
            / np.bincount(idx[ok], minlength=5))
    # cosmic variance of a shell average: sqrt(2 / n_modes) with n_modes counting k and -k
    assert np.all(np.abs(res.power[0] / want - 1) < 4 * np.sqrt(2 / res.n_modes))


# ---------------------------------------------------------------- box mocks

def test_lognormal_box_density_seed_and_displacement():
    # Poisson mean: N = nbar V within 5 sigma of (Poisson + field) scatter; the same seed
    # gives the same mock (common practice); rms displacement ~ sigma_psi of the mesh spectrum
    # (Zel'dovich 1970, sigma^2 = (1/3) sum P / k^2 / V), within 15% cosmic variance.
    box, n, nbar = 400.0, 32, 5e-4
    a = lognormal_box(toy_power, box, n, nbar, 1.5, 0.7, seed=5, progress=False)
    b = lognormal_box(toy_power, box, n, nbar, 1.5, 0.7, seed=5, progress=False)
    np.testing.assert_array_equal(a.positions, b.positions)
    expected = nbar * box**3
    assert abs(len(a) - expected) < 5 * np.sqrt(expected) + 0.05 * expected
    assert a.positions.min() >= 0 and a.positions.max() < box
    rms = np.sqrt(np.mean(a.displacement**2, axis=0))
    np.testing.assert_allclose(rms, a.meta["sigma_psi"], rtol=0.15)
    s = a.redshift_space_positions(los_axis=2)
    shift = (s - a.positions + box / 2) % box - box / 2
    np.testing.assert_allclose(shift[:, 2], 0.7 * a.displacement[:, 2], atol=1e-9)
    np.testing.assert_allclose(shift[:, :2], 0.0, atol=1e-9)


def test_zeldovich_box_positions_are_lattice_plus_displacement():
    # Zel'dovich 1970: x = q + psi(q) with q on the lattice; here x - psi must sit on nodes.
    box, n = 300.0, 32
    m = zeldovich_box(toy_power, box, n, 2e-4, 1.8, 0.6, seed=2, progress=False)
    q = (m.positions - m.displacement) % box / (box / n)
    np.testing.assert_allclose(q, np.round(q), atol=1e-6)
    expected = 2e-4 * box**3
    assert abs(len(m) - expected) < 5 * np.sqrt(expected)
    assert m.meta["b_lagrangian_effective"] == pytest.approx(0.8, rel=1e-8)


def test_zeldovich_box_refuses_an_unknown_start_point_scheme():
    # checked before any mesh work: a one-line error naming the setting and the choices
    with pytest.raises(InputError, match="lagrangian_positions must be 'nodes' or 'cells'"):
        zeldovich_box(toy_power, 300.0, 32, 2e-4, 1.8, 0.6, seed=2, progress=False,
                      lagrangian_positions="grid")


def test_clipped_linear_bias_against_quadrature():
    # Stein's lemma (Stein 1981 [from memory]): large-scale bias of w(delta) is <w'> / <w> for
    # Gaussian delta; scipy.integrate.quad reference of both expectations.
    for b_l, sigma in ((1.0, 0.5), (2.5, 0.8), (-0.6, 1.2)):
        pdf = stats.norm(scale=sigma).pdf
        lim = 12 * sigma
        ew = integrate.quad(lambda d: max(0.0, 1 + b_l * d) * pdf(d), -lim, lim, points=[-1 / b_l])[0]
        ewp = integrate.quad(lambda d: (b_l if 1 + b_l * d > 0 else 0.0) * pdf(d), -lim, lim,
                             points=[-1 / b_l])[0]
        assert clipped_linear_bias(b_l, sigma) == pytest.approx(ewp / ew, rel=1e-7)
    b_w = lagrangian_bias_for(2.0, 0.7)
    assert clipped_linear_bias(b_w, 0.7) == pytest.approx(1.0, rel=1e-9)
    with pytest.raises(InputError, match="cannot be reached"):
        lagrangian_bias_for(5.0, 1.0)  # limit ~ 1.25 / sigma


def test_clipped_bias_moments_against_quadrature():
    # Stein's lemma twice (Stein 1981 [from memory]): <w''> = <w(d) (d^2 - s^2)> / s^4 for
    # Gaussian d, an expectation of w itself (no delta function); scipy.integrate.quad.
    for b_l, sigma in ((1.0, 0.5), (5.6, 1.3), (-0.6, 1.2)):
        pdf = stats.norm(scale=sigma).pdf
        lim = 12 * sigma
        ew = integrate.quad(lambda d: max(0.0, 1 + b_l * d) * pdf(d), -lim, lim,
                            points=[-1 / b_l])[0]
        ew2 = integrate.quad(lambda d: max(0.0, 1 + b_l * d) * (d * d - sigma**2) * pdf(d),
                             -lim, lim, points=[-1 / b_l])[0] / sigma**4
        b1, b2 = clipped_bias_moments(b_l, sigma)
        assert b1 == pytest.approx(clipped_linear_bias(b_l, sigma), rel=1e-12)
        assert b2 == pytest.approx(ew2 / ew, rel=1e-7)


@pytest.mark.parametrize("kwargs, match", [
    (dict(nbar=-1e-4), "density"),
    (dict(bias=0.0), "bias"),
    (dict(bias=-1.0), "bias"),
    (dict(n_mesh=8, box_size=2000.0), "too coarse"),
    (dict(growth_rate=-0.1), "growth_rate"),
    (dict(alpha_par=3.0), "alpha_par"),
])
def test_box_mock_bad_input(kwargs, match):
    # common practice: clear errors naming the bad value and the fix
    args = dict(power=toy_power, box_size=300.0, n_mesh=32, nbar=1e-4, bias=2.0,
                growth_rate=0.7, seed=1)
    args.update(kwargs)
    for gen in (lognormal_box, zeldovich_box):
        with pytest.raises(InputError, match=match):
            gen(**args, progress=False)


def test_zeldovich_grid_too_coarse_for_density():
    # common practice: a lattice sparser than the target density cannot be thinned to it
    with pytest.raises(InputError, match="too coarse"):
        zeldovich_box(toy_power, 300.0, 16, 1.0e-3, 2.0, 0.7, seed=1, progress=False)


# ---------------------------------------------------------------- dilation

def test_expected_dilation_against_astropy_distances():
    # Definitions of REFERENCES sec. 7 (Xu et al. 2013); distances from astropy's
    # FlatLambdaCDM built independently here, sound horizons given explicitly.
    true = dataclasses.replace(FLAT, omega_m=0.28, r_d=149.0)
    fid = FLAT
    z = 0.5
    at = FlatLambdaCDM(H0=70, Om0=0.28, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    af = FlatLambdaCDM(H0=70, Om0=0.30, Tcmb0=2.7255, Neff=3.046, m_nu=0.0)
    want_par = (af.H(z).value * 147.0) / (at.H(z).value * 149.0)
    want_perp = (at.comoving_distance(z).value / 149.0) / (af.comoving_distance(z).value / 147.0)
    d = expected_dilation(true, fid, z)
    assert d.alpha_par == pytest.approx(want_par, rel=1e-6)
    assert d.alpha_perp == pytest.approx(want_perp, rel=1e-6)
    assert d.alpha_iso == pytest.approx(want_par ** (1 / 3) * want_perp ** (2 / 3), rel=1e-9)
    same = expected_dilation(fid, fid, z)
    assert (same.alpha_par, same.alpha_perp, same.alpha_iso) == pytest.approx((1, 1, 1))


# ---------------------------------------------------------------- survey mode

def _uniform_box(n_obj, box, seed, psi=None, f=0.0):
    rng = np.random.default_rng(seed)
    pos = rng.uniform(0, box, size=(n_obj, 3))
    disp = np.zeros_like(pos) if psi is None else psi
    return BoxMock(positions=pos, displacement=disp, box_size=box, growth_rate=f, bias=1.0,
                   nbar=n_obj / box**3, kind="uniform")


FOOT = BoxFootprint(include=(SkyBox(20.0, 60.0, 10.0, 40.0),))


def test_carved_count_matches_cone_volume():
    # Geometry: N = nbar * (Omega / 3) (chi_max^3 - chi_min^3), Omega from the sky-box area
    # (common practice); Poisson tolerance 5 sigma.
    box = 1200.0
    mock = _uniform_box(400_000, box, 1)
    sky = carve_survey(mock, FLAT, FOOT, 0.1, 0.3, observer=(0, 0, 0), rsd=False)
    r1, r2 = FLAT.comoving_distance(0.1), FLAT.comoving_distance(0.3)
    expected = mock.nbar * FOOT.area_sr() / 3 * (r2**3 - r1**3)
    assert abs(len(sky) - expected) < 5 * np.sqrt(expected)
    assert np.all(FOOT.contains(sky.ra, sky.dec))
    assert sky.z.min() >= 0.1 and sky.z.max() < 0.3


def test_carving_applies_radial_rsd_and_nz():
    # Kaiser 1987 / Hamilton 1992 radial form: distance shifts by f psi . r_hat.
    box = 1200.0
    mock = _uniform_box(200_000, box, 2, f=0.5)
    mock = dataclasses.replace(mock, displacement=np.full((200_000, 3), 4.0))
    sky = carve_survey(mock, FLAT, FOOT, 0.1, 0.3, rsd=True)
    chi_obs = FLAT.comoving_distance(sky.z)
    chi_true = FLAT.comoving_distance(sky.z_cosmo)
    ra, dec = np.radians(sky.ra), np.radians(sky.dec)
    rhat = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], 1)
    np.testing.assert_allclose(chi_obs - chi_true, 0.5 * rhat @ np.full(3, 4.0), atol=1e-3)
    # n(z) thinning: half the density at every z keeps half the objects (binomial, 5 sigma)
    half = tabulated_nz([0.0, 1.0], [0.5 * mock.nbar, 0.5 * mock.nbar])
    thin = carve_survey(mock, FLAT, FOOT, 0.1, 0.3, rsd=True, nz=half, seed=3)
    assert abs(len(thin) - 0.5 * len(sky)) < 5 * np.sqrt(0.25 * len(sky))


def test_carving_errors():
    # common practice: a survey volume outside the box, an n(z) above the box density, or a
    # stretched box are refused with the reason and the fix.
    mock = _uniform_box(1000, 500.0, 3)
    with pytest.raises(InputError, match="outside the"):
        carve_survey(mock, FLAT, FOOT, 0.1, 0.3)
    big = _uniform_box(1000, 1200.0, 3)
    too_dense = tabulated_nz([0.0, 1.0], [1.0, 1.0])
    with pytest.raises(InputError, match="thinning cannot add"):
        carve_survey(big, FLAT, FOOT, 0.1, 0.3, nz=too_dense)
    with pytest.raises(InputError, match="stretch"):
        carve_survey(dataclasses.replace(big, alpha_par=1.05), FLAT, FOOT, 0.1, 0.3)


def test_survey_randoms_follow_comoving_volume():
    # astropy reference: dN/dz proportional to differential_comoving_volume for constant n;
    # chi-square of 10 redshift bins against it (p > 1e-4), and all points inside the footprint.
    ra, dec, z = survey_randoms(FOOT, FLAT, 0.2, 0.8, 200_000, seed=4)
    assert np.all(FOOT.contains(ra, dec))
    ac = FLAT.astropy()
    edges = np.linspace(0.2, 0.8, 11)
    vol = np.array([integrate.quad(lambda x: ac.differential_comoving_volume(x).value, a, b)[0]
                    for a, b in zip(edges[:-1], edges[1:])])
    counts = np.histogram(z, edges)[0]
    expected = vol / vol.sum() * z.size
    chi2 = np.sum((counts - expected) ** 2 / expected)
    assert stats.chi2.sf(chi2, 9) > 1e-4


def test_written_catalogue_loads_like_data(tmp_path):
    # The file is a normal catalogue: astropy reads back the same numbers (FITS and HDF5).
    from corrpipe.survey.catalog import load_sky_catalogue

    rng = np.random.default_rng(5)
    ra, dec, z = rng.uniform(20, 60, 50), rng.uniform(10, 40, 50), rng.uniform(0.2, 0.5, 50)
    for name in ("cat.fits", "cat.h5"):
        path = write_sky_catalogue(tmp_path / name, ra, dec, z, meta={"alpha_par": 1.05})
        table = Table.read(path)
        np.testing.assert_array_equal(table["RA"], ra)
        np.testing.assert_array_equal(table["Z"], z)
        cat = load_sky_catalogue(path, cosmology=FLAT)
        assert cat.positions.shape == (50, 3)
    with pytest.raises(InputError, match="exists"):
        write_sky_catalogue(tmp_path / "cat.fits", ra, dec, z)
    assert not list(tmp_path.glob("*.part*"))


def test_write_mocks_box_and_survey(tmp_path):
    # The [mock] table end to end on tiny meshes: files, truth JSON, expected dilation.
    import json

    box = MockSettings(kind="lognormal", n_mesh=32, box_size=300.0, nbar=2e-4,
                       alpha_par=1.05, alpha_perp=0.97, name="b")
    files = write_mocks(box, tmp_path, progress=False)
    truth = json.loads(files[0].truth.read_text())
    assert truth["dilation"]["alpha_par"] == 1.05
    assert len(Table.read(files[0].data)) == files[0].n_objects > 0
    survey = MockSettings(geometry="survey", n_mesh=64, box_size=900.0, nbar=3e-4,
                          z_min=0.1, z_max=0.25, footprint=((20.0, 60.0, 10.0, 40.0),),
                          true_omega_m=0.29, randoms_factor=2.0, format="hdf5", name="s")
    files = write_mocks(survey, tmp_path, progress=False)
    assert files[0].randoms is not None
    assert len(Table.read(files[0].randoms)) == pytest.approx(2 * files[0].n_objects, abs=1)
    assert files[0].dilation.alpha_perp != 1.0
    with pytest.raises(ConfigError, match="nz_densities"):
        dataclasses.replace(survey, nz_redshifts=(0.1, 0.2)).validate()


def test_demo_inputs_are_a_loadable_survey_with_known_truth(tmp_path):
    # The demo survey (fictional): files load as a normal catalogue, the config validates, and
    # the truth is the astropy-distance dilation of its true vs fiducial cosmology
    # (REFERENCES sec. 7 definitions) at the sample's mean redshift.
    import json

    from corrpipe.survey.catalog import load_sky_catalogue
    from corrpipe.config import load_config
    from corrpipe.cosmology import preset
    from corrpipe.demo import SURVEY_NAME, demo_settings, write_demo_inputs
    from corrpipe.mocks import true_cosmology

    d = write_demo_inputs(tmp_path, seed=3, scale="tiny", progress=False)
    cat = load_sky_catalogue(d.data, cosmology=preset("planck2018"))
    assert cat.positions.shape[0] == d.n_galaxies > 1_000
    assert len(Table.read(d.randoms)) == d.n_randoms
    load_config(d.config)
    doc = json.loads(d.truth_file.read_text())
    assert doc["survey"] == SURVEY_NAME and doc["fictional"] is True
    want = expected_dilation(true_cosmology(demo_settings("tiny", 3)), preset("planck2018"),
                             float(np.mean(Table.read(d.data)["Z"])))
    assert d.truth.alpha_par == pytest.approx(want.alpha_par, rel=1e-9)
    assert abs(d.truth.alpha_perp - 1) > 0.02  # a dilation is injected
    # same seed, same catalogue (common practice: reproducible mocks)
    again = write_demo_inputs(tmp_path / "again", seed=3, scale="tiny", progress=False)
    np.testing.assert_array_equal(Table.read(again.data)["Z"], Table.read(d.data)["Z"])



def test_demo_with_fiducial_truth_is_a_null_test():
    # The validation null test: made in the fiducial cosmology, the expected dilation is 1
    # (alpha = ratio of D/r_d in the same cosmology; REFERENCES sec. 7 definitions) and only
    # the cosmology changes, not the survey.
    import dataclasses

    from corrpipe.cosmology import preset
    from corrpipe.demo import demo_settings
    from corrpipe.mocks import true_cosmology

    null = demo_settings("large", 5, fiducial_truth=True)
    assert true_cosmology(null) == preset("planck2018")
    truth = expected_dilation(true_cosmology(null), preset("planck2018"), 0.5)
    assert (truth.alpha_par, truth.alpha_perp) == pytest.approx((1.0, 1.0), abs=1e-12)
    usual = dataclasses.asdict(demo_settings("large", 5))
    differs = {k for k, v in dataclasses.asdict(null).items() if usual[k] != v}
    assert differs == {"true_h", "true_omega_m", "true_omega_b"}

@pytest.mark.parametrize("values, match", [
    (dict(nbar=-1e-4), "nbar"),
    (dict(bias=0.0), "bias"),
    (dict(n_mesh=16, box_size=2000.0), "too coarse"),
    (dict(kind="gaussian"), "kind"),
    (dict(geometry="survey", z_min=0.5, z_max=0.3), "z_min"),
    (dict(footprint=[[1.0, 2.0, 3.0]]), "footprint"),
])
def test_mock_table_bad_values_are_config_errors(values, match, tmp_path):
    # common practice: the [mock] table is checked by the config loader before any work,
    # and the message names the key
    from corrpipe.config import validate_section

    with pytest.raises(ConfigError, match=match):
        validate_section(MockSettings, values, "mock", "mocks.toml", tmp_path)


def test_truth_vs_recovered_text():
    # common practice: offset in units of half the 16-84% width
    from corrpipe.demo import truth_vs_recovered
    from corrpipe.mocks import Dilation

    truth = Dilation(alpha_par=1.0, alpha_perp=0.96, alpha_iso=0.9731, z_eff=0.48)
    summary = {"alpha_par": {"median": 1.1, "p16": 1.0, "p84": 1.2},
               "alpha_perp": {"median": 0.96, "p16": 0.94, "p84": 0.98}}
    text = truth_vs_recovered(truth, summary)
    assert "+1.00σ" in text and "+0.00σ" in text and "alpha " not in text
