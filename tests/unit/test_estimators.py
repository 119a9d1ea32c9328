"""Estimators, multipoles, wedges, w_p and rebinning against independent references."""

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pytest
from numpy.polynomial import legendre as npleg
from scipy import integrate, special
from scipy.spatial import cKDTree

from corrpipe.errors import ConfigError, InputError
from corrpipe.estimators import (correlation, davis_peebles, hamilton, landy_szalay,
                                 legendre_bin_integrals, multipoles, normalised_counts,
                                 peebles_hauser, projected, rebin_counts, wedges)
from corrpipe.paircount.result import PairCounts

sys.path.insert(0, str(Path(__file__).parent))
from pair_oracle import brute_counts  # noqa: E402


def test_normalisation_of_weighted_counts_is_total_pairs():
    # Landy & Szalay 1993 normalisation generalised to weights ([from memory], REFERENCES §4):
    # with every pair in one bin, normalised counts are exactly 1
    rng = np.random.default_rng(1)
    p1, p2 = rng.random((60, 3)), rng.random((80, 3))
    w1, w2 = rng.random(60) + 0.5, rng.random(80) + 0.5
    auto = brute_counts(p1, w1, [0.0, 10.0])
    cross = brute_counts(p1, w1, [0.0, 10.0], pos2=p2, w2=w2)
    assert normalised_counts(auto)[0] == pytest.approx(1.0, rel=1e-12)
    assert normalised_counts(cross)[0] == pytest.approx(1.0, rel=1e-12)


def test_estimator_formulas():
    # common practice: the four estimators written out on normalised counts
    dd, dr, rr = np.array([1.2, 0.9]), np.array([1.05, 1.0]), np.array([1.0, 1.1])
    assert np.allclose(landy_szalay(dd, dr, rr), (dd - 2 * dr + rr) / rr)
    assert np.allclose(peebles_hauser(dd, rr), dd / rr - 1)
    assert np.allclose(davis_peebles(dd, dr), dd / dr - 1)
    assert np.allclose(hamilton(dd, dr, rr), dd * rr / dr**2 - 1)
    assert np.isnan(landy_szalay(dd, dr, np.array([0.0, 1.0]))[0])


def _poisson_trials(n_trials=200, n_data=400, n_rand=5000, box=100.0, seed=5):
    """LS and PH xi on many uniform catalogues; counts from scipy cKDTree.count_neighbors."""
    rng = np.random.default_rng(seed)
    edges = np.array([3.0, 5.0, 7.0, 9.0, 11.0, 25.0, 35.0, 45.0])
    rand = rng.random((n_rand, 3)) * box
    tr = cKDTree(rand)
    rr_c = np.diff((tr.count_neighbors(tr, edges) - n_rand) / 2.0)
    rr = rr_c / (n_rand * (n_rand - 1) / 2)
    ls, ph, dp, ham = [], [], [], []
    for _ in range(n_trials):
        data = rng.random((n_data, 3)) * box
        td = cKDTree(data)
        dd = np.diff((td.count_neighbors(td, edges) - n_data) / 2.0) / (n_data * (n_data - 1) / 2)
        dr = np.diff(td.count_neighbors(tr, edges)) / (n_data * n_rand)
        ls.append(landy_szalay(dd, dr, rr))
        ph.append(peebles_hauser(dd, rr))
        dp.append(davis_peebles(dd, dr))
        ham.append(hamilton(dd, dr, rr))
    n_pairs = n_data * (n_data - 1) / 2 * rr
    return np.array(ls), np.array(ph), np.array(dp), np.array(ham), n_pairs


@pytest.fixture(scope="module")
def poisson_trials():
    return _poisson_trials()


def test_ls_on_poisson_is_unbiased_with_poisson_scatter(poisson_trials):
    # Landy & Szalay 1993 (REFERENCES §4 [from memory]): on Poisson catalogues xi_LS averages
    # to 0 with variance 1/N_pairs per bin (N_pairs = n(n-1)/2 G_p) for n_r -> infinity. With
    # one fixed random set of n_r points, the data-induced scatter of 2 DR adds 2q/N_pairs,
    # q = n/n_r (Poisson count of randoms around each object; common practice).
    # 200 trials: sample variance known to ~10 % per bin, ~5 % over the 4 small bins
    ls, _, dp, ham, n_pairs = poisson_trials
    small = slice(0, 4)
    mean, var = ls.mean(axis=0), ls.var(axis=0, ddof=1)
    assert np.all(np.abs(mean) < 4 * np.sqrt(var / ls.shape[0]))
    ratio = np.mean(var[small] * n_pairs[small]) / (1 + 2 * 400 / 5000)
    assert 0.85 < ratio < 1.15
    for other in (dp, ham):  # the other estimators are also unbiased here
        assert np.all(np.abs(other.mean(axis=0)) < 4 * np.sqrt(other.var(axis=0) / len(other)))


def test_ls_has_lower_variance_than_peebles_hauser(poisson_trials):
    # Landy & Szalay 1993: DD/RR - 1 carries an extra O(1/n) variance term that LS cancels;
    # it dominates in large-separation bins
    ls, ph, _, _, _ = poisson_trials
    large = slice(5, 7)
    assert np.all(ph.var(axis=0)[large] > 2.0 * ls.var(axis=0)[large])


def _clustered_counts(seed=2, n_regions=4):
    rng = np.random.default_rng(seed)
    data = rng.random((300, 3)) * 50 + 100
    rand = rng.random((1200, 3)) * 50 + 100
    wd, wr = rng.random(300) + 0.5, rng.random(1200) + 0.5
    rd = (data[:, 0] > 125).astype(int) + 2 * (data[:, 1] > 125)
    rra = (rand[:, 0] > 125).astype(int) + 2 * (rand[:, 1] > 125)
    s_edges, mu_edges = np.linspace(0, 20, 11), np.linspace(0, 1, 11)
    kw = dict(mu_edges=mu_edges, n_regions=n_regions)
    dd = brute_counts(data, wd, s_edges, regions1=rd, **kw)
    dr = brute_counts(data, wd, s_edges, pos2=rand, w2=wr, regions1=rd, regions2=rra, **kw)
    rr = brute_counts(rand, wr, s_edges, regions1=rra, **kw)
    return (data, wd, rd), (rand, wr, rra), dd, dr, rr, s_edges, mu_edges


def test_delete_one_counts_equal_recount_without_the_region():
    # common practice (delete-one jackknife): removing region k from the stored counts equals
    # counting the catalogues with region k taken out (independent brute-force oracle)
    (data, wd, rd), (rand, wr, rra), dd, dr, rr, s_edges, mu_edges = _clustered_counts()
    k = 2
    kd, kr = rd != k, rra != k
    dd_k = brute_counts(data[kd], wd[kd], s_edges, mu_edges=mu_edges)
    dr_k = brute_counts(data[kd], wd[kd], s_edges, pos2=rand[kr], w2=wr[kr], mu_edges=mu_edges)
    rr_k = brute_counts(rand[kr], wr[kr], s_edges, mu_edges=mu_edges)
    for full, part in ((dd, dd_k), (dr, dr_k), (rr, rr_k)):
        assert np.allclose(normalised_counts(full, delete_region=k), part.normalised(),
                           rtol=1e-10, atol=0)
        assert np.allclose(normalised_counts(full, delete_region=k),
                           full.jackknife_weighted(k) / full.jackknife_norm(k), rtol=1e-12)
    xi_k = correlation(dd, rr, dr, delete_region=k)
    ref = landy_szalay(dd_k.normalised(), dr_k.normalised(), rr_k.normalised())
    assert np.allclose(xi_k, ref, rtol=1e-9, equal_nan=True)


def test_split_random_rr_counts_only_within_sets():
    # Keihänen et al. 2019: RR from sub-catalogues, pairs across sets dropped; the normalised
    # split RR equals summed within-set counts over summed within-set pair totals (oracle)
    rng = np.random.default_rng(3)
    rand = rng.random((2000, 3)) * 60
    w = rng.random(2000) + 0.5
    edges = np.linspace(2, 20, 7)
    sets = [brute_counts(rand[i::4], w[i::4], edges) for i in range(4)]
    split = normalised_counts(sets)
    ref = sum(s.weighted for s in sets) / sum(s.norm for s in sets)
    assert np.allclose(split, ref, rtol=1e-14)
    # merged form used by the counts stage (pair_norm / region_pair_norm fields) agrees
    labels = (rand[:, 0] > 30).astype(int) + 2 * (rand[:, 1] > 30)
    sets_r = [brute_counts(rand[i::4], w[i::4], edges, regions1=labels[i::4], n_regions=4)
              for i in range(4)]
    merged = dataclasses.replace(
        sets_r[0], weighted=sum(p.weighted for p in sets_r),
        region_both=sum(p.region_both for p in sets_r),
        region_one=sum(p.region_one for p in sets_r),
        sum_w1=float(w.sum()), sum_w1_sq=float((w**2).sum()), sum_w2=float(w.sum()),
        sum_w2_sq=float((w**2).sum()),
        region_sum_w1=np.bincount(labels, w), region_sum_w1_sq=np.bincount(labels, w**2),
        region_sum_w2=np.bincount(labels, w), region_sum_w2_sq=np.bincount(labels, w**2),
        pair_norm=float(sum(p.norm for p in sets_r)),
        region_pair_norm=np.array([sum(p.jackknife_norm(k) for p in sets_r)
                                   for k in range(4)]))
    for k in range(4):
        assert np.allclose(normalised_counts(merged, k), normalised_counts(sets_r, k),
                           rtol=1e-12)
        assert np.allclose(normalised_counts(merged, k, 0.7), normalised_counts(sets_r, k, 0.7),
                           rtol=2e-3)
    full = brute_counts(rand, w, edges).normalised()
    # same expectation: agree within the Poisson noise of the split pair counts
    n_split = sum(s.raw for s in sets)
    assert np.all(np.abs(split / full - 1) < 5 / np.sqrt(n_split))


def test_shifted_form_reduces_to_ls_without_shift():
    # Padmanabhan et al. 2012 [from memory]: with unshifted randoms S = R, (DD-2DS+SS)/RR = LS
    _, _, dd, dr, rr, _, _ = _clustered_counts()
    assert np.allclose(correlation(dd, rr, dr, ds=dr, ss=rr), correlation(dd, rr, dr),
                       equal_nan=True)
    with pytest.raises(InputError, match="both DS and SS"):
        correlation(dd, rr, dr, ds=dr)


def test_box_without_dr_uses_natural_estimator():
    # common practice: with the analytic RR of a periodic box, DR/RR = 1 and LS -> DD/RR - 1
    edges = (np.array([1.0, 2.0]),)
    box = 10.0
    frac = 4 / 3 * np.pi * (2**3 - 1) / box**3
    rr = PairCounts("s", edges, np.array([frac * 0.5 * (100**2 - 100)]), True, 100.0, 100.0,
                    100.0, 100.0, 100, 100, box_size=box)
    dd = PairCounts("s", edges, np.array([1.1 * frac * 0.5 * (50**2 - 50)]), True, 50.0,
                    50.0, 50.0, 50.0, 50, 50, box_size=box)
    assert correlation(dd, rr)[0] == pytest.approx(0.1, rel=1e-12)
    with pytest.raises(InputError, match="needs DR"):
        correlation(dd, rr, estimator="hamilton")
    with pytest.raises(ConfigError, match="estimator"):
        correlation(dd, rr, estimator="nonsense")


# --- projections -----------------------------------------------------------------------------

GAMMA, R0, BETA = 1.8, 5.0, 0.45


def _kaiser_power_law_multipoles(s):
    """Hamilton 1992 multipoles of a power-law xi = (s/r0)^-gamma with Kaiser factor beta.

    xi_bar = 3/(3-gamma) xi and xi_dbar = 5/(5-gamma) xi for a power law (closed form).
    """
    xi = (s / R0) ** -GAMMA
    xib, xibb = 3 / (3 - GAMMA) * xi, 5 / (5 - GAMMA) * xi
    x0 = (1 + 2 * BETA / 3 + BETA**2 / 5) * xi
    x2 = (4 * BETA / 3 + 4 * BETA**2 / 7) * (xi - xib)
    x4 = (8 * BETA**2 / 35) * (xi + 2.5 * xib - 3.5 * xibb)
    return np.array([x0, x2, x4])


def _bin_averaged_xi(s, mu_edges):
    """Average over each mu bin of sum_l xi_l L_l(mu), with numpy's Legendre integration."""
    ells = _kaiser_power_law_multipoles(s)  # (3, n_s)
    out = np.zeros((s.size, mu_edges.size - 1))
    for coef_l, ell in zip(ells, (0, 2, 4)):
        basis = np.zeros(ell + 1)
        basis[ell] = 1.0
        anti = npleg.legint(basis)
        out += coef_l[:, None] * (np.diff(npleg.legval(mu_edges, anti)) / np.diff(mu_edges))
    return out, ells


@pytest.mark.parametrize("mu_edges", [np.linspace(0, 1, 101), np.linspace(-1, 1, 41),
                                      np.array([0, 0.1, 0.35, 0.4, 0.7, 0.9, 1.0])])
def test_fit_multipoles_recover_kaiser_to_1e6(mu_edges):
    # Hamilton 1992 (linear Kaiser form in configuration space): bin-averaged xi(s, mu) has
    # no power beyond l = 4, so the bin-averaged Legendre fit must return it to 1e-6
    s = np.linspace(20, 150, 14)
    xi, truth = _bin_averaged_xi(s, mu_edges)
    got = multipoles(xi, mu_edges, (0, 2, 4), method="fit")
    assert np.allclose(got, truth, rtol=1e-6, atol=1e-12)


def test_integrate_multipoles_exact_for_binwise_constant_xi():
    # scipy.integrate.quad reference: for xi constant within mu bins the exact-bin-integral
    # estimator equals (2l+1) ∫_0^1 xi(mu) L_l(mu) dmu
    mu_edges = np.array([0, 0.15, 0.3, 0.5, 0.55, 0.8, 1.0])
    values = np.array([0.3, -0.1, 0.25, 1.1, 0.05, -0.4])
    step = lambda m: values[min(np.searchsorted(mu_edges, m, side="right") - 1, 5)]  # noqa
    got = multipoles(values[None, :], mu_edges, (0, 2, 4, 6))[:, 0]
    for i, ell in enumerate((0, 2, 4, 6)):
        ref = (2 * ell + 1) * sum(integrate.quad(lambda m: step(m) * special.eval_legendre(
            ell, m), a, b)[0] for a, b in zip(mu_edges[:-1], mu_edges[1:]))
        assert got[i] == pytest.approx(ref, rel=1e-10, abs=1e-12)


def test_integrate_multipoles_binning_error_falls_as_dmu_squared():
    # common practice (error of a piecewise-constant quadrature): xi taken as constant in
    # each mu bin leaves an O(dmu^2) error for a smooth xi(mu); halving dmu divides it by ~4
    s = np.array([30.0, 80.0])

    def error(n_mu):
        mu_edges = np.linspace(0, 1, n_mu + 1)
        xi, truth = _bin_averaged_xi(s, mu_edges)
        return np.abs(multipoles(xi, mu_edges) - truth).max() / np.abs(truth).max()

    e40, e80 = error(40), error(80)
    assert e40 < 2e-3
    assert e40 / e80 == pytest.approx(4.0, rel=0.05)
    assert np.allclose(legendre_bin_integrals(np.linspace(0, 1, 41), 0), 0.025)


def test_wedges_of_kaiser_form():
    # Kaiser/Hamilton xi(s, mu) = sum_l xi_l L_l: a wedge is sum_l xi_l ∫_a^b L_l / (b - a)
    # (numpy Legendre integration reference); aligned wedges on bin-averaged input are exact
    mu_edges = np.linspace(0, 1, 21)
    s = np.linspace(40, 120, 5)
    xi, truth = _bin_averaged_xi(s, mu_edges)
    got = wedges(xi, mu_edges, [(0.0, 0.5), (0.5, 1.0), (0.2, 0.35)])
    for w, (a, b) in enumerate([(0.0, 0.5), (0.5, 1.0), (0.2, 0.35)]):
        ref = sum(truth[i] * np.diff(npleg.legval([a, b], npleg.legint(np.eye(ell + 1)[ell])))
                  for i, ell in enumerate((0, 2, 4))) / (b - a)
        assert np.allclose(got[w], ref, rtol=1e-10)
    # signed mu bins give the same |mu| wedges for an even function
    signed = np.linspace(-1, 1, 41)
    xs, _ = _bin_averaged_xi(s, signed)
    assert np.allclose(wedges(xs, signed, [(0.0, 0.5)]), got[:1], rtol=1e-10)
    # a wedge edge inside a bin takes the bin's overlap fraction (step function, exact)
    step = np.array([[1.0, 3.0]])
    assert wedges(step, [0, 0.5, 1.0], [(0.25, 0.75)])[0, 0] == pytest.approx(2.0)
    with pytest.raises(ConfigError):
        wedges(xi, mu_edges, [(0.6, 0.4)])


def test_projected_power_law_matches_davis_peebles_closed_form():
    # Davis & Peebles 1983 [from memory]: for xi = (r/r0)^-gamma,
    # w_p(r_p) = r_p (r0/r_p)^gamma Gamma(1/2) Gamma((gamma-1)/2) / Gamma(gamma/2);
    # the finite-pi_max tail is added with scipy.integrate.quad
    rp = np.array([2.0, 8.0, 20.0])
    pi_edges = np.linspace(0, 100, 51)
    xi = np.array([[integrate.quad(lambda p: (np.hypot(r, p) / R0) ** -GAMMA, a, b)[0] / (b - a)
                    for a, b in zip(pi_edges[:-1], pi_edges[1:])] for r in rp])
    tail = np.array([2 * integrate.quad(lambda p: (np.hypot(r, p) / R0) ** -GAMMA, 100,
                                        np.inf)[0] for r in rp])
    closed = rp * (R0 / rp) ** GAMMA * special.gamma(0.5) * special.gamma((GAMMA - 1) / 2) \
        / special.gamma(GAMMA / 2)
    assert np.allclose(projected(xi, pi_edges) + tail, closed, rtol=1e-6)
    # signed pi bins: no factor 2, same answer; pi_max must be an edge
    signed = np.concatenate([-pi_edges[:0:-1], pi_edges])
    xs = np.concatenate([xi[:, ::-1], xi], axis=1)
    assert np.allclose(projected(xs, signed), projected(xi, pi_edges), rtol=1e-12)
    half = projected(xi, pi_edges, pi_max=50.0)
    assert np.allclose(half, 2 * xi[:, :25].sum(axis=1) * 2.0)
    with pytest.raises(ConfigError, match="pi_max"):
        projected(xi, pi_edges, pi_max=51.0)


def test_rebin_equals_recount_with_coarse_bins():
    # common practice: merged stored counts equal a recount in the coarse bins (oracle)
    rng = np.random.default_rng(4)
    pos, w = rng.random((500, 3)) * 80 + 200, rng.random(500) + 0.5
    s_edges, mu_edges = np.linspace(0, 40, 21), np.linspace(0, 1, 21)
    labels = (pos[:, 2] > 240).astype(int)
    fine = brute_counts(pos, w, s_edges, mu_edges=mu_edges, regions1=labels, n_regions=2)
    coarse = rebin_counts(fine, 4, 5)
    ref = brute_counts(pos, w, s_edges[::4], mu_edges=mu_edges[::5], regions1=labels,
                       n_regions=2)
    assert np.allclose(coarse.weighted, ref.weighted, rtol=1e-12)
    assert np.array_equal(coarse.raw, ref.raw)
    assert np.allclose(coarse.region_both, ref.region_both, rtol=1e-12)
    assert np.allclose(coarse.region_one, ref.region_one, rtol=1e-12)
    sub = rebin_counts(fine, s_edges[2:12:2])  # a sub-range with merged pairs of bins
    ref2 = brute_counts(pos, w, s_edges[2:12:2], mu_edges=mu_edges)
    assert np.allclose(sub.weighted, ref2.weighted, rtol=1e-12)
    with pytest.raises(ConfigError, match="divide"):
        rebin_counts(fine, 3)
    with pytest.raises(ConfigError, match="subset"):
        rebin_counts(fine, [0.0, 3.0, 40.0])


def test_estimate_from_counts_assembles_the_projections(tmp_path):
    # wiring check against the building blocks tested above (internal consistency), with
    # s/mu merging equal to a recount in coarse bins (brute-force oracle)
    import h5py

    from corrpipe.estimators import Estimate, EstimateSettings, estimate_from_counts

    (data, wd, rd), (rand, wr, rra), dd, dr, rr, s_edges, mu_edges = _clustered_counts()
    settings = EstimateSettings(ells=(0, 2), wedges=((0.0, 0.4), (0.4, 1.0)), s_merge=2)
    est = estimate_from_counts({"DD": dd, "DR": dr, "RR": rr}, settings)
    coarse = s_edges[::2]
    ref_xi = landy_szalay(*(brute_counts(*args, coarse, mu_edges=mu_edges, **kw).normalised()
                            for args, kw in (((data, wd), {}),
                                             ((data, wd), dict(pos2=rand, w2=wr)),
                                             ((rand, wr), {}))))
    assert np.allclose(est.xi_smu, ref_xi, rtol=1e-10, equal_nan=True)
    assert np.allclose(est.multipoles, multipoles(ref_xi, mu_edges, (0, 2)), equal_nan=True)
    assert est.vector().shape == (2 * 5,)
    assert np.allclose(est.s[0], 0.75 * (4.0**4) / 4.0**3)  # volume-weighted bin centre
    # w_p from (r_p, pi) counts
    pi_edges = np.linspace(0, 20, 11)
    kw = dict(mu_edges=pi_edges, mode="rppi")
    rppi = {"DD": brute_counts(data, wd, s_edges, **kw),
            "DR": brute_counts(data, wd, s_edges, pos2=rand, w2=wr, **kw),
            "RR": brute_counts(rand, wr, s_edges, **kw)}
    est_p = estimate_from_counts({"DD": dd, "DR": dr, "RR": rr},
                                 EstimateSettings(pi_max=10.0), rppi)
    xi_p = correlation(rppi["DD"], rppi["RR"], rppi["DR"])
    assert np.allclose(est_p.wp, 2 * xi_p[:, :5].sum(axis=1) * 2.0, equal_nan=True)
    with h5py.File(tmp_path / "est.h5", "w") as f:
        est_p.to_hdf5_group(f.create_group("estimate"))
    with h5py.File(tmp_path / "est.h5", "r") as f:
        back = Estimate.from_hdf5_group(f["estimate"])
    assert back.ells == (0, 2, 4) and back.pi_max == 10.0
    assert np.array_equal(back.multipoles, est_p.multipoles, equal_nan=True)
    with pytest.raises(InputError, match="missing"):
        estimate_from_counts({"DD": dd}, settings)


def test_estimate_settings_checked_on_load():
    # config errors name the key (common practice for config validation)
    from corrpipe.config import validate_section
    from corrpipe.estimators import EstimateSettings

    with pytest.raises(ConfigError, match=r"wedges\[0\]"):
        validate_section(EstimateSettings,
                         {"wedges": [[0.5, 0.2]]}, "estimate", "run.toml", Path("."))
    with pytest.raises(ConfigError, match="distinct"):
        validate_section(EstimateSettings,
                         {"ells": [0, 2, 2]}, "estimate", "run.toml", Path("."))
