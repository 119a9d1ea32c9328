"""Covariances: correction factors, mocks vs numpy.cov, jackknife on Poisson catalogues,
Gaussian box covariance limits, and clear errors for uninvertible matrices."""

import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from corrpipe.covariance import (CovarianceResult, gaussian_box_covariance, hartlap_factor,
                                 jackknife_covariance, jackknife_samples, mock_covariance,
                                 mohammad_percival_weight, percival_factors)
from corrpipe.errors import ConfigError, InputError, StageError
from corrpipe.estimators import multipoles
from corrpipe.survey.regions import cube_regions

sys.path.insert(0, str(Path(__file__).parent))
from pair_oracle import brute_counts  # noqa: E402


@pytest.mark.parametrize("n, p, expect", [(1000, 40, 0.958959), (600, 40, 0.931553),
                                          (100, 20, 0.787879)])
def test_hartlap_factor(n, p, expect):
    # Hartlap, Simon & Schneider 2007, eq. 17 [from memory]; values REFERENCES §5 [COMP]
    assert hartlap_factor(n, p) == pytest.approx(expect, abs=1e-6)


@pytest.mark.parametrize("ns, nb, npar, m1, m2", [(600, 40, 3, 1.058817, 1.136616),
                                                  (1000, 40, 3, 1.034337, 1.078604),
                                                  (600, 18, 5, 1.011960, 1.045110)])
def test_percival_factors(ns, nb, npar, m1, m2):
    # Percival et al. 2014, eqs. 18 and 22 [from memory]; values REFERENCES §5 [COMP]
    got = percival_factors(ns, nb, npar)
    assert got == pytest.approx((m1, m2), abs=1e-6)


def test_mock_covariance_matches_numpy_cov():
    # numpy.cov reference (unbiased, rows = mocks)
    x = np.random.default_rng(1).multivariate_normal([0, 1, 2], [[2, .5, 0], [.5, 1, .2],
                                                                 [0, .2, .5]], size=300)
    cov = mock_covariance(x)
    assert np.allclose(cov.matrix, np.cov(x, rowvar=False), rtol=1e-12)
    assert cov.n_samples == 300 and cov.hartlap == pytest.approx((300 - 3 - 2) / 299)
    assert cov.percival(2) == pytest.approx(percival_factors(300, 3, 2))


def test_jackknife_formula():
    # delete-one jackknife (N-1)/N sum (x_k - mean)^2 = (N-1)^2/N numpy.cov (common practice)
    x = np.random.default_rng(2).standard_normal((40, 5))
    cov = jackknife_covariance(x)
    assert np.allclose(cov.matrix, np.cov(x, rowvar=False) * 39**2 / 40, rtol=1e-12)


@pytest.fixture(scope="module")
def poisson_box_counts():
    rng = np.random.default_rng(7)
    box, n_d, n_r = 100.0, 3000, 12000
    data, rand = rng.random((n_d, 3)) * box, rng.random((n_r, 3)) * box
    rd, rr_lab = cube_regions(data, box, 6), cube_regions(rand, box, 6)
    s_edges = np.array([3.0, 5.0, 7.0, 9.0])
    mu_edges = np.linspace(0, 1, 6)
    kw = dict(mu_edges=mu_edges, n_regions=216, los="z")
    dd = brute_counts(data, np.ones(n_d), s_edges, regions1=rd, **kw)
    dr = brute_counts(data, np.ones(n_d), s_edges, pos2=rand, w2=np.ones(n_r), regions1=rd,
                      regions2=rr_lab, **kw)
    rr = brute_counts(rand, np.ones(n_r), s_edges, regions1=rr_lab, **kw)
    return dd, dr, rr, mu_edges


@pytest.mark.slow
def test_jackknife_monopole_variance_matches_poisson(poisson_box_counts):
    # Poisson expectation of xi_LS (Landy & Szalay 1993, REFERENCES §4 [from memory]) with the
    # random catalogue's own shot noise: Var = 1/N_dd + 4/N_dr + 1/N_rr
    # = (1 + 2 q + q^2)/N_dd for q = n_d/n_r (independent pair-count fluctuations, common
    # practice). Standard delete-one jackknife counts each pair that straddles two regions in
    # two samples, so it exceeds this by the straddling fraction c (Mohammad & Percival 2022);
    # their cross-pair weighting removes that excess. 216 regions: ~10 % noise per bin.
    dd, dr, rr, mu_edges = poisson_box_counts

    def monopole(xi):
        return multipoles(xi, mu_edges, (0,))[0]

    q = dd.n1 / rr.n1
    poisson = (1 + 2 * q + q**2) / (rr.normalised().sum(axis=1) * dd.norm)
    straddling = rr.region_one.sum(axis=(0, 2)) / 2 / rr.weighted.sum(axis=1)
    samples, alpha = jackknife_samples(dd, rr, dr, vector=monopole, weighting="standard",
                                       progress=False)
    assert alpha == 1.0 and samples.shape == (216, 3)
    ratio = np.diag(jackknife_covariance(samples).matrix) / poisson
    assert 0.85 < np.mean(ratio / (1 + straddling)) < 1.2
    assert np.mean(ratio) > 1.2  # the standard jackknife overestimates here
    # Mohammad & Percival 2022 weighting: alpha = n/(2 + sqrt(2)(n - 1)) [from memory]
    mp, alpha_mp = jackknife_samples(dd, rr, dr, vector=monopole,
                                     weighting="mohammad_percival", progress=False)
    assert alpha_mp == pytest.approx(216 / (2 + np.sqrt(2) * 215))
    assert alpha_mp == mohammad_percival_weight(216)
    ratio_mp = np.diag(jackknife_covariance(mp, alpha_mp).matrix) / poisson
    assert 0.85 < np.mean(ratio_mp) < 1.2


def test_gaussian_covariance_poisson_limit():
    # P(k) = 0 leaves pure shot noise: Var(xi_l) = (2l+1)/N_pairs with N_pairs = n^2 V V_i / 2
    # (Landy & Szalay 1993 Poisson limit; Grieb et al. 2016 [from memory]); bins independent
    nbar, volume = 3e-4, 1e9
    edges = np.linspace(20, 120, 11)
    cov = gaussian_box_covariance(lambda k: np.zeros_like(k), nbar, volume, edges)
    shell = 4 / 3 * np.pi * (edges[1:] ** 3 - edges[:-1] ** 3)
    n_pairs = nbar**2 * volume * shell / 2
    expect = np.concatenate([(2 * ell + 1) / n_pairs for ell in (0, 2, 4)])
    assert np.allclose(np.diag(cov.matrix), expect, rtol=1e-12)
    assert np.allclose(cov.matrix - np.diag(np.diag(cov.matrix)), 0.0, atol=1e-20)


def test_gaussian_covariance_white_noise_equals_shot_noise():
    # a constant P0 adds to the shot noise: [P0 + 1/n]^2 = 1/n_eff^2 with 1/n_eff = P0 + 1/n,
    # so the numerical k integral must reproduce the closed-form Poisson covariance of n_eff
    # (orthogonality of spherical Bessel functions; truncation error ~ 1/(pi k_max ds))
    nbar, volume, p0 = 3e-4, 1e9, 2000.0
    edges = np.linspace(30, 110, 9)
    cov = gaussian_box_covariance(lambda k: np.full_like(k, p0), nbar, volume, edges,
                                  ells=(0, 2), k_max=12.0)
    n_eff = 1 / (p0 + 1 / nbar)
    shell = 4 / 3 * np.pi * (edges[1:] ** 3 - edges[:-1] ** 3)
    expect = np.concatenate([2 * (2 * ell + 1) / (n_eff**2 * volume * shell) for ell in (0, 2)])
    assert np.allclose(np.diag(cov.matrix), expect, rtol=0.01)
    corr = cov.matrix / np.sqrt(np.outer(np.diag(cov.matrix), np.diag(cov.matrix)))
    assert np.abs(corr - np.eye(corr.shape[0])).max() < 0.01
    # a (k, P) table is accepted and gives the same answer
    k = np.geomspace(1e-4, 20, 400)
    tab = gaussian_box_covariance((k, np.full_like(k, p0)), nbar, volume, edges, ells=(0, 2),
                                  k_max=12.0)
    assert np.allclose(tab.matrix, cov.matrix, rtol=1e-6, atol=1e-18)


def test_invertibility_checks_and_errors():
    # common practice: N jackknife regions give rank <= N - 1; need more samples than bins
    x = np.random.default_rng(3).standard_normal((6, 10))
    with pytest.raises(StageError, match="rank at most 5 < 10 bins"):
        jackknife_covariance(x).precision()
    with pytest.raises(StageError, match="n_samples > n_bins"):
        hartlap_factor(12, 10)
    bad = x.copy()
    bad[2, 3] = np.nan
    with pytest.raises(InputError, match=r"samples \[2\]"):
        mock_covariance(bad)
    ill = CovarianceResult(np.diag([1.0, 1e-14]), "analytic")
    with pytest.raises(StageError, match="ill-conditioned"):
        ill.precision()
    good = mock_covariance(np.random.default_rng(4).standard_normal((200, 4)))
    prec = good.precision()
    assert np.allclose(prec, np.linalg.inv(good.matrix) * (200 - 4 - 2) / 199)


def test_hdf5_round_trip(tmp_path):
    cov = mock_covariance(np.random.default_rng(5).standard_normal((50, 3)))
    with h5py.File(tmp_path / "cov.h5", "w") as f:
        cov.to_hdf5_group(f.create_group("covariance"))
    with h5py.File(tmp_path / "cov.h5", "r") as f:
        back = CovarianceResult.from_hdf5_group(f["covariance"])
        assert f["covariance"].attrs["condition_number"] == pytest.approx(cov.condition_number)
    assert back.kind == "mocks" and back.n_samples == 50
    assert np.array_equal(back.matrix, cov.matrix) and np.array_equal(back.mean, cov.mean)


def test_jackknife_from_counts_and_mock_paths(poisson_box_counts, tmp_path):
    # wiring check against jackknife_samples + jackknife_covariance (internal consistency)
    from corrpipe.covariance import CovarianceSettings, expand_mock_paths, jackknife_from_counts
    from corrpipe.estimators import EstimateSettings

    dd, dr, rr, mu_edges = poisson_box_counts
    est = EstimateSettings(ells=(0, 2))
    cov = jackknife_from_counts({"DD": dd, "DR": dr, "RR": rr}, est, CovarianceSettings(),
                                progress=False)
    samples, _ = jackknife_samples(dd, rr, dr, vector=lambda xi: multipoles(
        xi, mu_edges, (0, 2)).ravel(), progress=False)
    assert np.allclose(cov.matrix, jackknife_covariance(samples).matrix, rtol=1e-10)
    assert cov.n_samples == 216 and cov.meta["cross_weight"] == mohammad_percival_weight(216)
    for i in range(3):
        (tmp_path / f"mock_{i}.fits").write_text("x")
    files = expand_mock_paths([str(tmp_path / "mock_*.fits"), str(tmp_path / "mock_1.fits")])
    assert [Path(f).name for f in files] == ["mock_0.fits", "mock_1.fits", "mock_2.fits"]
    with pytest.raises(ConfigError, match="matches no file"):
        expand_mock_paths([str(tmp_path / "none_*.fits")])


def test_gaussian_covariance_kaiser_mu_weighting():
    # for a k-independent spectrum, sigma^2_ll is constant in k and the orthogonality of
    # spherical Bessel functions gives C_ll(s_i, s_i) = sigma^2_ll / V_i with
    # sigma^2_ll = (2l+1)^2/V ∫_{-1}^{1} [P0 (1 + beta mu^2)^2 + 1/n]^2 L_l^2 dmu
    # (Grieb et al. 2016 [from memory]); the mu integral is checked with scipy.integrate.quad
    from scipy import integrate, special

    nbar, volume, p0, beta = 3e-4, 1e9, 2000.0, 0.6
    edges = np.linspace(30, 110, 9)
    cov = gaussian_box_covariance(lambda k: np.full_like(k, p0), nbar, volume, edges,
                                  ells=(0, 2, 4), beta=beta, k_max=12.0)
    shell = 4 / 3 * np.pi * (edges[1:] ** 3 - edges[:-1] ** 3)
    n_s = shell.size
    for a, ell in enumerate((0, 2, 4)):
        mu_int = integrate.quad(lambda m: (p0 * (1 + beta * m * m) ** 2 + 1 / nbar) ** 2
                                * special.eval_legendre(ell, m) ** 2, -1, 1)[0]
        expect = (2 * ell + 1) ** 2 / volume * mu_int / shell
        block = cov.matrix[a * n_s:(a + 1) * n_s, a * n_s:(a + 1) * n_s]
        assert np.allclose(np.diag(block), expect, rtol=0.01)
