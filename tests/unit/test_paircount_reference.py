"""Pair counts against outside references: scipy's cKDTree, and analytic uniform-box expectations.

References
----------
- scipy.spatial.cKDTree.count_neighbors (scipy reference), with weights and with ``boxsize=``
  for periodic boxes; it counts ordered pairs, so distinct pairs are half of it.
- Uniform points in a periodic box: the expected number of pairs in a separation bin is
  N(N-1)/2 * V_bin / V, with Poisson scatter (common practice), and mu is uniform on [0, 1].
- Split random catalogue: Keihänen et al. 2019 (A&A 631, A73) - RR over M subsets normalised by
  the sum of the subsets' pair totals estimates the same pair fraction as the full RR.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.spatial import cKDTree

from corrpipe.errors import InputError
from corrpipe.paircount import (
    Binning,
    analytic_box_rr,
    bin_volumes,
    count_pairs,
    split_indices,
    split_random_rr,
)


def _kdtree_distinct(pos, w, edges, pos2=None, w2=None, boxsize=None):
    tree = cKDTree(pos, boxsize=boxsize)
    if pos2 is None:
        cum = tree.count_neighbors(tree, edges, weights=(w, w), cumulative=True)
        return 0.5 * np.diff(cum)  # ordered pairs; no pair has zero separation here
    other = cKDTree(pos2, boxsize=boxsize)
    return np.diff(tree.count_neighbors(other, edges, weights=(w, w2), cumulative=True))


@pytest.mark.parametrize("periodic", [False, True])
@pytest.mark.parametrize("cross", [False, True])
def test_weighted_isotropic_counts_match_ckdtree(periodic, cross):
    # scipy.spatial.cKDTree.count_neighbors reference; radii compare with <= there and < here,
    # which differ only on a set of measure zero
    rng = np.random.default_rng(5)
    box = 300.0
    pos = rng.uniform(0, box, (3000, 3))
    w = rng.uniform(0.5, 1.5, 3000)
    pos2 = rng.uniform(0, box, (2000, 3)) if cross else None
    w2 = rng.uniform(0.2, 2.0, 2000) if cross else None
    edges = np.geomspace(1.0, 100.0, 16)
    boxsize = box if periodic else None
    ours = count_pairs(pos, w, pos2, w2, binning=Binning.from_edges(edges), box_size=boxsize)
    ref = _kdtree_distinct(pos, w, edges, pos2, w2, boxsize)
    np.testing.assert_allclose(ours.weighted, ref, rtol=1e-11, atol=0)


def test_periodic_box_rr_matches_analytic_expectation():
    # common practice: E[pairs in bin] = N(N-1)/2 V_bin / V; Poisson scatter per bin
    rng = np.random.default_rng(2026)
    box, n = 500.0, 6000
    pos = rng.uniform(0, box, (n, 3))
    binning = Binning.linear(10.0, 120.0, 11, n_mu=5)
    res = count_pairs(pos, binning=binning, los="z", box_size=box, raw=True)
    expected = analytic_box_rr(binning, box, sum_w=n, sum_w_sq=n, n=n)
    np.testing.assert_allclose(expected.weighted.sum(axis=1),
                               0.5 * n * (n - 1) * 4 / 3 * np.pi * np.diff(binning.edges[0] ** 3)
                               / box**3, rtol=1e-12)
    pulls = (res.raw - expected.weighted) / np.sqrt(expected.weighted)
    # 55 bins, each a unit Gaussian pull in the Poisson limit: chi^2 with 55 dof
    chi2 = float(np.sum(pulls**2))
    assert stats.chi2.sf(chi2, pulls.size) > 1e-3, f"chi2 = {chi2:.1f} for {pulls.size} bins"
    assert np.max(np.abs(pulls)) < 5.0
    # mu uniform on [0, 1]: totals over s per mu bin are equal within Poisson errors
    per_mu = res.raw.sum(axis=0)
    chi2_mu = float(np.sum((per_mu - per_mu.mean()) ** 2 / per_mu.mean()))
    assert stats.chi2.sf(chi2_mu, per_mu.size - 1) > 1e-3
    # weighted = raw for unit weights, norm = N(N-1)/2 (Landy & Szalay 1993 normalisation)
    np.testing.assert_array_equal(res.weighted, res.raw.astype(float))
    assert res.norm == pytest.approx(0.5 * n * (n - 1))


def test_periodic_rppi_matches_cylinder_volumes():
    # common practice: (r_p, pi) bin volume pi (r2^2 - r1^2) * 2 dpi for |pi| bins
    rng = np.random.default_rng(77)
    box, n = 400.0, 5000
    pos = rng.uniform(0, box, (n, 3))
    binning = Binning.linear(5.0, 60.0, 5, pi_max=60.0, n_pi=4)
    res = count_pairs(pos, binning=binning, los="x", box_size=box, raw=True)
    expected = 0.5 * n * (n - 1) * bin_volumes(binning) / box**3
    pulls = (res.raw - expected) / np.sqrt(expected)
    assert stats.chi2.sf(float(np.sum(pulls**2)), pulls.size) > 1e-3


def test_bin_volumes_are_geometric():
    # elementary geometry: the mu sectors of a shell add up to the shell; signed mu halves them
    b = Binning.linear(0.0, 30.0, 3, n_mu=4)
    shell = 4 / 3 * np.pi * (np.array([10.0, 20.0, 30.0]) ** 3 - np.array([0.0, 10.0, 20.0]) ** 3)
    np.testing.assert_allclose(bin_volumes(b).sum(axis=1), shell, rtol=1e-14)
    signed = Binning.linear(0.0, 30.0, 3, n_mu=8, mu_range="signed")
    np.testing.assert_allclose(bin_volumes(signed).sum(axis=1), shell, rtol=1e-14)
    cyl = Binning.linear(0.0, 10.0, 2, pi_max=4.0, n_pi=2)
    np.testing.assert_allclose(bin_volumes(cyl).sum(), np.pi * 100.0 * 8.0, rtol=1e-14)


def test_split_random_rr_normalisation():
    # Keihänen et al. 2019: sum_m RR_m / sum_m norm_m estimates RR / norm of the full set
    rng = np.random.default_rng(8)
    box, n = 300.0, 8000
    pos = rng.uniform(0, box, (n, 3))
    w = rng.uniform(0.5, 1.5, n)
    reg = rng.integers(0, 3, n)
    binning = Binning.linear(20.0, 100.0, 4)
    subsets = split_indices(n, 4)
    assert sorted(np.concatenate(subsets).tolist()) == list(range(n))
    split = split_random_rr([(pos[i], w[i], reg[i]) for i in subsets], binning=binning,
                            box_size=box, n_regions=3, raw=True)
    full = count_pairs(pos, w, binning=binning, box_size=box, regions1=reg, n_regions=3)
    norms = [0.5 * (w[i].sum() ** 2 - np.sum(w[i] ** 2)) for i in subsets]
    assert split.norm == pytest.approx(sum(norms), rel=1e-12)
    assert split.meta["split_sets"] == 4 and split.n1 == n
    # same pair fraction within the Poisson scatter of the split count (~1/sqrt(pairs))
    frac_split, frac_full = split.normalised(), full.normalised()
    sigma = frac_full / np.sqrt(split.raw)
    assert np.all(np.abs(frac_split - frac_full) < 4 * sigma)
    # jackknife normalisations: the per-set delete-one norms add up
    k = 1
    expected_k = sum(0.5 * ((w[i][reg[i] != k]).sum() ** 2 - np.sum(w[i][reg[i] != k] ** 2))
                     for i in subsets)
    assert split.jackknife_norm(k) == pytest.approx(expected_k, rel=1e-12)
    np.testing.assert_allclose(split.jackknife_weighted(k),
                               split.weighted - split.region_both[k] - split.region_one[k])


def test_analytic_rr_rejects_bins_larger_than_half_the_box():
    # common practice: minimum-image separations only reach half the box
    with pytest.raises(InputError, match="half the box"):
        analytic_box_rr(Binning.linear(0.0, 80.0, 4), 150.0, 10.0, 10.0, 10)
