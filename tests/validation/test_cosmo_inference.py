"""Expansion-history inference against a published result, Fisher errors and recovery.

References:
- DESI Collaboration 2024, "DESI 2024 VI", arXiv:2404.03002, Table 1 (the BAO measurements;
  values FROM MEMORY, REFERENCES §14, file data/desi2024_bao_table1_memory.ecsv) and its
  BAO-only flat ΛCDM result Omega_m = 0.295 +- 0.015, h r_d = 101.8 +- 1.3 Mpc [from memory].
- Fisher matrix of a Gaussian likelihood (Tegmark, Taylor & Heavens 1997): its inverse equals
  the posterior covariance for a near-Gaussian posterior.
- Recovery of known parameters from simulated distances (common practice): unbiased means
  and 68 % coverage of the 1-sigma intervals.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from corrpipe.cosmo import (BinSamples, DataVector, DistanceLikelihood, ExpansionModel,
                            ParameterSpace, SampleDensity, laplace, read_external,
                            sample_posterior)
from corrpipe.cosmo.infer import best_fit

TABLE = Path(__file__).parent / "data" / "desi2024_bao_table1_memory.ecsv"


@pytest.fixture(scope="module")
def desi_lcdm():
    like = DistanceLikelihood(ParameterSpace(ExpansionModel("flat-lcdm")),
                              read_external(TABLE))
    return like, sample_posterior(like, seed=11, progress=False)


def test_published_flat_lcdm_constraints_from_the_desi_table(desi_lcdm):
    _, res = desi_lcdm
    assert res.converged
    for name, (value, error) in {"Omega_m": (0.295, 0.015), "h_rd": (101.8, 1.3)}.items():
        c = res.constraints[name]
        sigma = 0.5 * (c["interval_68"][1] - c["interval_68"][0])
        assert abs(c["median"] - value) < 0.3 * error, name
        assert abs(sigma / error - 1) < 0.10, name
    # REFERENCES §14 [COMP]: chi2_min = 12.81 for 12 - 2 = 10 dof
    assert res.dof == 10
    assert res.chi2 == pytest.approx(12.81, abs=0.05)


def test_fisher_errors_within_10_percent_of_mcmc_flat_lcdm(desi_lcdm):
    _, res = desi_lcdm  # 7 bins, 12 numbers: near-Gaussian posterior
    for name in ("Omega_m", "h_rd"):
        c = res.constraints[name]
        sigma = 0.5 * (c["interval_68"][1] - c["interval_68"][0])
        assert abs(c["fisher_error"] / sigma - 1) < 0.10, name


def _recovery(kind, truth, error_scale, n_pairs, seed):
    d = read_external(TABLE)
    cov = d.covariance * error_scale**2
    like = DistanceLikelihood(ParameterSpace(ExpansionModel(kind)),
                              DataVector(d.measurements, cov, d.origin))
    mean = like.predict(truth)
    chol = np.linalg.cholesky(cov)
    rng = np.random.default_rng(seed)
    pulls, single = [], []
    for _ in range(n_pairs):
        noise = chol @ rng.standard_normal(mean.size)
        for sign in (1.0, -1.0):   # antithetic pair: the linear part of a bias cancels
            r = laplace(like.with_values(mean + sign * noise), start=truth)
            pulls.append((r["best_fit"] - truth) / r["errors"])
        single.append(pulls[-2])    # one of each pair: independent draws for the coverage
    return np.array(pulls), np.array(single)


def test_recovery_of_a_w0wa_cosmology():
    # 200 antithetic pairs (400 data sets) of the table's 12 distances drawn around a known
    # w0waCDM model, with the table's correlations and errors / 10 (a stage-5-like survey,
    # where the posterior is near-Gaussian). Each data set: best fit + Fisher errors
    # (Laplace approximation, the cheap posterior; the MCMC is checked above).
    truth = np.array([0.31, 100.0, -0.8, -0.5])
    pulls, single = _recovery("w0wacdm", truth, 0.1, 200, seed=5)
    mean_pull = pulls.mean(axis=0)
    assert np.all(np.abs(mean_pull[:3]) < 0.1), mean_pull      # Omega_m, h_rd, w0
    assert abs(mean_pull[3]) < 0.1, mean_pull                   # wa, reported separately
    coverage = np.mean(np.abs(single) < 1.0, axis=0)
    assert np.all((coverage > 0.6) & (coverage < 0.76)), coverage


def test_recovery_of_flat_lcdm_at_the_table_errors():
    truth = np.array([0.31, 100.0])
    pulls, single = _recovery("flat-lcdm", truth, 1.0, 200, seed=8)
    assert np.all(np.abs(pulls.mean(axis=0)) < 0.1), pulls.mean(axis=0)
    coverage = np.mean(np.abs(single) < 1.0, axis=0)
    assert np.all((coverage > 0.6) & (coverage < 0.76)), coverage


def test_chain_density_likelihood_agrees_with_gaussian_for_gaussian_bins():
    # Bins whose posterior samples are Gaussian: the kernel-density likelihood must give the
    # Gaussian best fit (to a fraction of its error; the KDE widens by 1 + n^(-1/3)).
    d = read_external(TABLE)
    rng = np.random.default_rng(4)
    bins, densities = [], {}
    for label in ("LRG1", "LRG2", "LRG3+ELG1", "ELG2", "Lya"):
        rows = [i for i, m in enumerate(d.measurements) if m.label == label]
        cov = d.covariance[np.ix_(rows, rows)]
        samples = rng.multivariate_normal(d.values[rows], cov, size=8000)
        b = BinSamples(label, d.measurements[rows[0]].z, ("DM_over_rd", "DH_over_rd"), samples)
        bins.append(b.data_vector())
        densities[label] = SampleDensity(samples)
    from corrpipe.cosmo import combine

    data = combine(bins)
    space = ParameterSpace(ExpansionModel("flat-lcdm"))
    gauss = laplace(DistanceLikelihood(space, data))
    exact = best_fit(DistanceLikelihood(space, data, densities))
    assert np.all(np.abs(exact - gauss["best_fit"]) < 0.2 * gauss["errors"])


def test_bbn_prior_gives_the_published_h0():
    # DESI 2024 VI (arXiv:2404.03002) BAO + BBN under flat ΛCDM: H0 = 68.53 +- 0.80 km/s/Mpc
    # [from memory], with the BBN prior omega_b = 0.02218 +- 0.00055 (REFERENCES §14 [from
    # memory]); r_d here comes from the Aubourg et al. (2015) fitting formula, theirs from a
    # Boltzmann code, so agreement to 0.3 sigma is what the formula's ~0.1-0.2 % allows.
    space = ParameterSpace(ExpansionModel("flat-lcdm"), omega_b_prior=(0.02218, 0.00055))
    like = DistanceLikelihood(space, read_external(TABLE))
    fit = laplace(like)
    i = space.names.index("h")
    h0, err = 100 * fit["best_fit"][i], 100 * fit["errors"][i]
    assert abs(h0 - 68.53) < 0.3 * 0.80
    assert abs(err / 0.80 - 1) < 0.10


def test_r_d_prior_propagates_to_h0_errors():
    # H0 = 100 h_rd / r_d: with BAO fixing h_rd and an independent Gaussian r_d prior,
    # sigma(H0)/H0 = sqrt[(sigma_hrd/h_rd)^2 + (sigma_rd/r_d)^2] (first-order error
    # propagation; common practice). Prior: Planck 2018 r_drag 147.09 +- 0.26 Mpc (§2).
    bao = laplace(DistanceLikelihood(ParameterSpace(ExpansionModel("flat-lcdm")),
                                     read_external(TABLE)))
    space = ParameterSpace(ExpansionModel("flat-lcdm"), r_d_prior=(147.09, 0.26))
    fit = laplace(DistanceLikelihood(space, read_external(TABLE)))
    h_rd, s_hrd = bao["best_fit"][1], bao["errors"][1]
    h = fit["best_fit"][space.names.index("h")]
    want = h * np.hypot(s_hrd / h_rd, 0.26 / 147.09)
    assert fit["errors"][space.names.index("h")] == pytest.approx(want, rel=0.02)
    # the radiation density now follows the sampled h; h_rd barely moves (< 0.05 sigma)
    assert abs(fit["best_fit"][1] - h_rd) < 0.05 * s_hrd


def test_interrupted_chain_resumes_to_the_uninterrupted_one(tmp_path):
    # The resumable emcee machinery of the BAO fit (corrpipe.fit.sampler): a chain stopped
    # at 400 steps and continued to 800 equals one run straight to 800 (common practice:
    # the same seed and stored generator state give the same chain).
    like = DistanceLikelihood(ParameterSpace(ExpansionModel("flat-lcdm")),
                              read_external(TABLE))
    kw = dict(seed=9, progress=False, check_every=200, tau_factor=1e6)
    part = sample_posterior(like, progress_path=tmp_path / "p.h5", max_steps=400, **kw)
    assert not part.converged
    resumed = sample_posterior(like, progress_path=tmp_path / "p.h5", max_steps=800, **kw)
    straight = sample_posterior(like, max_steps=800, **kw)
    assert resumed.convergence["resumed_from"] == 400
    assert np.array_equal(resumed.chain, straight.chain)
