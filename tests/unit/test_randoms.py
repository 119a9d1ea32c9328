"""Random catalogues: footprint, redshift distribution, seeds, split sets, errors."""

import h5py
import numpy as np
import pytest
from scipy import stats

from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.footprint import BoxFootprint, FootprintMismatchWarning, HealpixFootprint, SkyBox
from corrpipe.survey.randoms import (RandomCatalogue, box_randoms, make_randoms,
                              outside_random_coverage)

FOOTPRINT = BoxFootprint((SkyBox(340, 20, -10, 10), SkyBox(100, 130, 20, 40)))


def _data(n, seed):
    rng = np.random.default_rng(seed)
    z = np.clip(rng.normal(0.55, 0.08, n), 0.35, 0.75)
    w = 1.0 + 0.5 * (z > 0.6) + 0.1 * rng.random(n)
    return z, w


def test_same_seed_same_catalogue_and_different_seed_differs():
    # common practice: reproducible randoms from an explicit seed
    z, w = _data(2000, 1)
    a = make_randoms(FOOTPRINT, z, w, size_factor=5, seed=42, progress=False)
    b = make_randoms(FOOTPRINT, z, w, size_factor=5, seed=42, progress=False)
    c = make_randoms(FOOTPRINT, z, w, size_factor=5, seed=43, progress=False)
    for name in ("ra", "dec", "z", "weights"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert not np.array_equal(a.ra, c.ra)
    assert len(a) == 10_000
    assert FOOTPRINT.contains(a.ra, a.dec).all()


def test_shuffled_randoms_reproduce_data_nz_within_shot_noise():
    # common practice (shuffled redshifts): random z histogram is multinomial with the data's
    # bin fractions; chi-square against them (scipy.stats.chi2), and the weights travel with z
    z, w = _data(5000, 2)
    r = make_randoms(FOOTPRINT, z, w, size_factor=20, seed=7, progress=False)
    edges = np.linspace(0.35, 0.75, 17)
    nd = np.histogram(z, edges)[0]
    nr = np.histogram(r.z, edges)[0]
    expected = nd / nd.sum() * nr.sum()
    ok = expected > 0
    chi2 = np.sum((nr[ok] - expected[ok]) ** 2 / expected[ok])
    assert stats.chi2.sf(chi2, ok.sum() - 1) > 1e-3
    mean_w_data = np.histogram(z, edges, weights=w)[0][ok] / nd[ok]
    mean_w_rand = np.histogram(r.z, edges, weights=r.weights)[0][ok] / nr[ok]
    assert np.allclose(mean_w_rand, mean_w_data, rtol=0.02)


def test_smoothed_nz_randoms_follow_data_within_shot_noise():
    # common practice: a kernel-smoothed n(z) matches the data within the data's Poisson error
    # when the kernel is much narrower than the n(z) features (bias ~ (sigma/scale)^2 / 2)
    rng = np.random.default_rng(3)
    z = rng.normal(0.55, 0.1, 8000)
    z = z[(z > 0.3) & (z < 0.8)]
    r = make_randoms(FOOTPRINT, z, None, size_factor=20, redshifts="smooth", smoothing=0.005,
                     z_min=0.3, z_max=0.8, seed=9, progress=False)
    assert r.z.min() >= 0.3 and r.z.max() <= 0.8
    assert np.all(r.weights == 1.0)
    edges = np.linspace(0.3, 0.8, 11)
    nd = np.histogram(z, edges)[0]
    nr = np.histogram(r.z, edges)[0] * (z.size / r.z.size)
    chi2 = np.sum((nr - nd) ** 2 / (nd * (1 + z.size / r.z.size)))
    assert stats.chi2.sf(chi2, nd.size) > 1e-3


def test_split_sets_are_balanced_and_selectable():
    # Keihänen et al. 2019: the random catalogue cut into independent subsets
    z, w = _data(1000, 4)
    r = make_randoms(FOOTPRINT, z, w, size_factor=8, n_sets=4, seed=1, progress=False)
    assert np.array_equal(np.bincount(r.subset), [2000] * 4)
    s2 = r.select_set(2)
    assert len(s2) == 2000 and np.array_equal(s2.ra, r.ra[r.subset == 2])
    with pytest.raises(InputError):
        r.select_set(4)


def test_completeness_weight_from_healpix_map():
    # common practice: completeness as a weight multiplies the random weight
    nside = 2
    values = np.zeros(48)
    values[[0, 1]] = [1.0, 0.5]
    fp = HealpixFootprint(values, nside, "nested", weight_by_completeness=True)
    r = make_randoms(fp, np.full(100, 0.5), None, size_factor=50, seed=2, progress=False)
    pix = fp.pixel_of(r.ra, r.dec)
    assert np.all(r.weights[pix == 0] == 1.0) and np.all(r.weights[pix == 1] == 0.5)
    # equal-area pixels: both receive half the points within binomial error
    frac = np.mean(pix == 1)
    assert abs(frac - 0.5) < 4 * np.sqrt(0.25 / len(r))


def test_hdf5_round_trip(tmp_path):
    z, w = _data(200, 5)
    r = make_randoms(FOOTPRINT, z, w, size_factor=3, n_sets=3, seed=11, progress=False)
    with h5py.File(tmp_path / "randoms.h5", "w") as f:
        r.to_hdf5_group(f.create_group("randoms"))
    with h5py.File(tmp_path / "randoms.h5", "r") as f:
        back = RandomCatalogue.from_hdf5_group(f["randoms"])
    assert back.seed == 11 and back.n_sets == 3
    assert np.array_equal(back.z, r.z) and np.array_equal(back.subset, r.subset)


def test_errors_for_bad_requests():
    z, w = _data(100, 6)
    with pytest.raises(ConfigError, match="size_factor"):
        make_randoms(FOOTPRINT, z, w, size_factor=0.5, seed=1, progress=False)
    with pytest.raises(InputError, match="fewer than the 100 data"):
        make_randoms(FOOTPRINT, z, w, n_randoms=50, seed=1, progress=False)
    with pytest.raises(ConfigError, match="seed"):
        make_randoms(FOOTPRINT, z, w, seed=None, progress=False)
    with pytest.raises(InputError, match="empty"):
        make_randoms(FOOTPRINT, [], None, seed=1, progress=False)
    with pytest.raises(ConfigError, match="redshifts"):
        make_randoms(FOOTPRINT, z, w, redshifts="uniform", seed=1, progress=False)


def test_coverage_check_of_supplied_randoms_warns():
    # common practice: data outside the randoms' coverage is flagged
    rng = np.random.default_rng(8)
    rra, rdec = SkyBox(0, 30, 0, 30).sample(50_000, rng)
    dra, ddec = SkyBox(0, 40, 0, 30).sample(2_000, rng)
    with pytest.warns(FootprintMismatchWarning):
        frac = outside_random_coverage(dra, ddec, rra, rdec, nside=32)
    assert 0.15 < frac < 0.35  # a quarter of the data box is outside, up to pixel edges


def test_box_randoms_uniform_and_seeded():
    # common practice: uniform points in the box (scipy.stats.kstest per axis)
    a = box_randoms(20_000, 500.0, 3)
    assert np.array_equal(a, box_randoms(20_000, 500.0, 3))
    assert a.min() >= 0 and a.max() < 500
    assert stats.kstest(a[:, 1] / 500.0, "uniform").pvalue > 1e-3
