"""n(z) and FKP weights against closed forms, astropy volumes and a uniform-density mock."""

import h5py
import numpy as np
import pytest
from scipy import stats

from corrpipe.cosmology import Cosmology
from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.footprint import SkyBox
from corrpipe.survey.weights import (RedshiftDensity, combine_fkp, fkp_weights, redshift_density,
                              redshift_edges, shell_volumes)

COSMO = Cosmology()


def test_shell_volumes_match_astropy_comoving_volume():
    # astropy.cosmology FLRW.comoving_volume reference (all-sky, Mpc^3), scaled to the area
    # and to (Mpc/h)^3 with h^3
    edges = np.array([0.1, 0.3, 0.55, 0.8, 1.2])
    area = 0.7
    ref = np.diff(COSMO.astropy().comoving_volume(edges).value) * area / (4 * np.pi) * COSMO.h**3
    assert np.allclose(shell_volumes(edges, area, COSMO), ref, rtol=2e-6)


def test_fkp_closed_form_constant_density():
    # Feldman, Kaiser & Peacock 1994, sec. 2.3 [from memory]: w = 1/(1 + n P0);
    # REFERENCES §6 [COMP]: n = 3e-4, P0 = 2e4 -> 1/7
    assert fkp_weights(3e-4, 2e4) == pytest.approx(1 / 7, rel=1e-14)
    nbar = np.full(5, 2.5e-4)
    assert np.allclose(fkp_weights(nbar, 1e4), 1 / (1 + 2.5), rtol=1e-14)
    with pytest.raises(ConfigError):
        fkp_weights(nbar, -1.0)


def test_combine_fkp_with_catalogue_weights():
    # common practice: total weight = catalogue weight x FKP weight at the object's n(z)
    edges = np.array([0.4, 0.5, 0.6])
    nz = RedshiftDensity(edges, np.array([1e-4, 4e-4]), np.ones(2), np.ones(2, np.int64),
                         np.ones(2), 1.0)
    w = combine_fkp(np.array([2.0, 1.0, 3.0]), np.array([0.45, 0.55, 0.65]), nz, 1e4)
    assert np.allclose(w, [2.0 / 2.0, 1.0 / 5.0, 3.0])  # last is outside: n = 0 -> w_FKP = 1


def _uniform_shell_mock(n0, z_lo, z_hi, box, seed):
    rng = np.random.default_rng(seed)
    chi_lo, chi_hi = COSMO.comoving_distance(np.array([z_lo, z_hi]))
    volume = box.area_sr() / 3 * (chi_hi**3 - chi_lo**3)
    n = rng.poisson(n0 * volume)
    chi = (chi_lo**3 + rng.random(n) * (chi_hi**3 - chi_lo**3)) ** (1 / 3)
    return COSMO.redshift_at(chi), volume


def test_nz_of_uniform_mock_recovers_density_within_poisson_error():
    # common practice: a Poisson sample of constant density n0 has n(z) = n0 within sqrt(N)
    n0, box = 3e-4, SkyBox(0, 10, 0, 10)
    z, _ = _uniform_shell_mock(n0, 0.4, 0.7, box, seed=11)
    nz = redshift_density(z, None, redshift_edges(z, 0.03, 0.4, 0.7), box.area_sr(), COSMO)
    expected = n0 * nz.volumes
    chi2 = np.sum((nz.weighted_counts - expected) ** 2 / expected)
    assert stats.chi2.sf(chi2, nz.nbar.size) > 1e-3
    total = nz.weighted_counts.sum() / nz.volumes.sum()
    assert abs(total - n0) < 4 * n0 / np.sqrt(expected.sum())


def test_weighted_histogram_and_interpolation():
    # common practice: n(z) uses the weighted counts; step lookup returns the bin value
    z = np.array([0.41, 0.42, 0.55])
    w = np.array([1.0, 2.0, 0.5])
    nz = redshift_density(z, w, [0.4, 0.5, 0.6], 1.0, COSMO)
    assert np.allclose(nz.weighted_counts, [3.0, 0.5])
    assert np.allclose(nz.at([0.45, 0.59, 0.7]), [nz.nbar[0], nz.nbar[1], 0.0])
    lin = nz.at(np.array([0.45, 0.5, 0.55]), "linear")
    assert lin[1] == pytest.approx(0.5 * (nz.nbar[0] + nz.nbar[1]))


def test_nz_hdf5_round_trip(tmp_path):
    nz = redshift_density([0.41, 0.52], None, [0.4, 0.5, 0.6], 0.2, COSMO)
    with h5py.File(tmp_path / "nz.h5", "w") as f:
        nz.to_hdf5_group(f.create_group("nz"))
    with h5py.File(tmp_path / "nz.h5", "r") as f:
        back = RedshiftDensity.from_hdf5_group(f["nz"])
    assert np.array_equal(back.nbar, nz.nbar) and back.area_sr == nz.area_sr


def test_bad_inputs():
    with pytest.raises(InputError, match="weights"):
        redshift_density([0.5, 0.6], [1.0], [0.4, 0.7], 1.0, COSMO)
    with pytest.raises(ConfigError, match="increasing"):
        redshift_density([0.5], None, [0.7, 0.4], 1.0, COSMO)
    with pytest.raises(InputError, match="area"):
        redshift_density([0.5], None, [0.4, 0.7], 0.0, COSMO)


def test_tabulated_density_rows_match_one_table_per_row():
    # Per-class n(z) tables evaluated row by row agree with np.interp between bin centres
    # (numpy reference) and with the step lookup; class -1 and z outside give 0.
    from corrpipe.survey.weights import tabulated_density

    edges = np.linspace(0.8, 1.4, 7)
    nbar = np.array([[1.0, 2.0, 3.0, 4.0, 5.0, 6.0], [6.0, 5.0, 4.0, 3.0, 2.0, 1.0]]) * 1e-4
    z = np.array([0.7, 0.8, 0.93, 1.05, 1.22, 1.4, 1.5, 1.1])
    rows = np.array([0, 1, 0, 1, 0, 1, 0, -1])
    centres = 0.5 * (edges[1:] + edges[:-1])
    linear = tabulated_density(edges, nbar, z, "linear", rows=rows)
    step = tabulated_density(edges, nbar, z, "step", rows=rows)
    for i in range(z.size):
        inside = edges[0] <= z[i] <= edges[-1] and rows[i] >= 0
        expect_lin = np.interp(z[i], centres, nbar[rows[i]]) if inside else 0.0
        assert linear[i] == pytest.approx(expect_lin, rel=1e-12, abs=0.0)
        expect_step = tabulated_density(edges, nbar[rows[i]], z[i:i + 1], "step")[0] \
            if inside else 0.0
        assert step[i] == expect_step
    with pytest.raises(ConfigError, match="nz_interpolation"):
        tabulated_density(edges, nbar, z, "cubic", rows=rows)
