"""The fast pair counter against an explicit numpy enumeration of every pair.

Reference: corrpipe.paircount.reference.brute_force_counts, an O(N^2) numpy loop written
independently of the cell lists and kernels, following the documented conventions (common
practice: s bin k holds s_k <= s < s_{k+1}; mu = d.l/(|d||l|); minimum image in a box).
Raw counts must be identical; weighted counts agree to 1e-12 relative (summation order only).
Also hand-computed distances for three points (elementary geometry).
"""

from __future__ import annotations

import numpy as np
import pytest

from corrpipe.paircount import Binning, count_pairs
from corrpipe.paircount.reference import brute_force_counts

RTOL = 1e-12
N_REGIONS = 5


def _survey(seed: int, n: int):
    """Invented points in a 240 Mpc/h cube away from the observer at the origin."""
    rng = np.random.default_rng(seed)
    pos = rng.uniform(0.0, 240.0, (n, 3)) + np.array([400.0, -150.0, 250.0])
    return pos, rng.uniform(0.5, 1.5, n), rng.integers(0, N_REGIONS, n)


def _box(seed: int, n: int, box: float):
    rng = np.random.default_rng(seed)
    return rng.uniform(0.0, box, (n, 3)), rng.uniform(0.5, 1.5, n), rng.integers(0, N_REGIONS, n)


BINNINGS = {
    "s-linear": Binning.linear(0.0, 60.0, 12),
    "s-log": Binning.log(2.0, 60.0, 9),
    "smu-abs": Binning.linear(0.0, 60.0, 12, n_mu=10),
    "smu-signed-log": Binning.log(3.0, 60.0, 7, n_mu=8, mu_range="signed"),
    "smu-uneven": Binning.from_edges([5.0, 12.0, 30.0, 31.0, 55.0], [0.1, 0.3, 0.35, 0.9]),
    "rppi": Binning.linear(0.0, 40.0, 8, pi_max=35.0, n_pi=7),
    "rppi-uneven": Binning.from_edges([1.0, 4.0, 20.0, 33.0], pi_edges=[2.0, 5.0, 11.0, 30.0]),
}


def _assert_same(result, ref, with_regions: bool):
    assert np.array_equal(result.raw, ref["raw"]), "raw counts differ from brute force"
    assert result.raw.sum() > 100  # the test exercises many pairs
    np.testing.assert_allclose(result.weighted, ref["weighted"], rtol=RTOL, atol=0)
    if with_regions:
        np.testing.assert_allclose(result.region_both, ref["both"], rtol=RTOL, atol=1e-12)
        np.testing.assert_allclose(result.region_one, ref["one"], rtol=RTOL, atol=1e-12)
        # every pair is in both[k] for one k, or in one[k] for exactly two k (definition)
        total = result.region_both.sum(axis=0) + 0.5 * result.region_one.sum(axis=0)
        np.testing.assert_allclose(total, result.weighted, rtol=1e-12, atol=1e-12)


# isotropic counts do not depend on the line of sight: one case each
SURVEY_CASES = [(name, los) for name, b in BINNINGS.items()
                for los in (["midpoint"] if b.mode == "s" else ["midpoint", "endpoint", "bisector", "z"])]


@pytest.mark.parametrize(("binning_name", "los"), SURVEY_CASES)
@pytest.mark.parametrize("cross", [False, True])
def test_survey_counts_match_brute_force(binning_name, los, cross):
    # reference: explicit enumeration (module docstring); exact raw, 1e-12 weighted
    binning = BINNINGS[binning_name]
    pos, w, reg = _survey(11, 450)
    kw, kw_ref = {}, {}
    if cross:
        pos2, w2, reg2 = _survey(12, 380)
        pos2 = pos2 + 20.0
        kw = dict(positions2=pos2, weights2=w2, regions2=reg2)
        kw_ref = dict(pos2=pos2, w2=w2, regions2=reg2)
    res = count_pairs(pos, w, binning=binning, los=los, raw=True, regions1=reg,
                      n_regions=N_REGIONS, n_units=7, **kw)
    ref = brute_force_counts(pos, w, binning=binning, los=los, regions1=reg,
                             n_regions=N_REGIONS, **kw_ref)
    _assert_same(res, ref, with_regions=True)
    assert res.auto is not cross
    np.testing.assert_allclose(res.region_sum_w1, np.bincount(reg, w, N_REGIONS), rtol=1e-12)


@pytest.mark.parametrize("binning_name", ["s-linear", "smu-abs", "smu-signed-log", "rppi"])
@pytest.mark.parametrize("cross", [False, True])
@pytest.mark.parametrize("box", [150.0, 400.0])
def test_periodic_counts_match_brute_force(binning_name, cross, box):
    # reference: explicit enumeration with minimum-image separations (common practice);
    # box = 150 Mpc/h has fewer than 3 cells per axis, so cells wrap onto themselves
    binning = BINNINGS[binning_name]
    n = 500 if box < 200 else 900
    pos, w, reg = _box(21, n, box)
    kw, kw_ref = {}, {}
    if cross:
        pos2, w2, reg2 = _box(22, n - 100, box)
        kw = dict(positions2=pos2, weights2=w2, regions2=reg2)
        kw_ref = dict(pos2=pos2, w2=w2, regions2=reg2)
    res = count_pairs(pos, w, binning=binning, los="x", box_size=box, raw=True, regions1=reg,
                      n_regions=N_REGIONS, **kw)
    ref = brute_force_counts(pos, w, binning=binning, los="x", box_size=box, regions1=reg,
                             n_regions=N_REGIONS, **kw_ref)
    _assert_same(res, ref, with_regions=True)


def test_without_regions_and_wrapped_box_positions():
    # reference: explicit enumeration; positions outside [0, L) are wrapped (documented)
    box = 200.0
    pos, w, _ = _box(31, 600, box)
    shifted = pos + np.array([box, -box, 3 * box])
    binning = BINNINGS["smu-abs"]
    res = count_pairs(shifted, w, binning=binning, los="y", box_size=box, raw=True)
    ref = brute_force_counts(pos, w, binning=binning, los="y", box_size=box)
    assert res.region_both is None and res.n_regions == 0
    _assert_same(res, ref, with_regions=False)


def test_three_points_by_hand():
    # elementary geometry: separations 5 (3-4-5 triangle), 10 and sqrt(125) = 11.18
    pos = np.array([[100.0, 0.0, 0.0], [103.0, 4.0, 0.0], [100.0, 0.0, 10.0]])
    w = np.array([1.0, 2.0, 3.0])
    res = count_pairs(pos, w, binning=Binning.from_edges([0.0, 6.0, 10.5, 12.0]), raw=True)
    np.testing.assert_array_equal(res.raw, [1, 1, 1])
    np.testing.assert_allclose(res.weighted, [2.0, 3.0, 6.0], rtol=1e-15)
    # mu with a fixed z line of sight: pair (0, 2) is along z (mu = 1, last bin includes 1),
    # pair (0, 1) is perpendicular (mu = 0), pair (1, 2) has mu = 10 / sqrt(125)
    res = count_pairs(pos, w, binning=Binning.from_edges([0.0, 12.0], [0.0, 0.5, 1.0]),
                      los="z", raw=True)
    np.testing.assert_array_equal(res.raw, [[1, 2]])
    assert res.norm == pytest.approx(0.5 * (6.0**2 - 14.0))


def test_signed_mu_orientation_follows_input_rows():
    # documented convention: d = x_later_row - x_earlier_row in an auto-count
    pos = np.array([[0.0, 0.0, 500.0], [0.0, 0.0, 510.0]])
    binning = Binning.from_edges([0.0, 20.0], [-1.0, 0.0, 1.0], mu_range="signed")
    up = count_pairs(pos, binning=binning, los="z", raw=True).raw
    down = count_pairs(pos[::-1].copy(), binning=binning, los="z", raw=True).raw
    np.testing.assert_array_equal(up, [[0, 1]])
    np.testing.assert_array_equal(down, [[1, 0]])


def test_empty_and_tiny_inputs():
    # common practice: no pairs -> zero counts, never an error
    binning = BINNINGS["smu-abs"]
    empty = count_pairs(np.zeros((0, 3)), binning=binning, raw=True)
    assert empty.weighted.shape == (12, 10) and empty.raw.sum() == 0
    one = count_pairs(np.array([[1.0, 2.0, 3.0]]), binning=binning, raw=True)
    assert one.raw.sum() == 0 and one.norm == 0.0
    cross = count_pairs(np.zeros((0, 3)), positions2=np.ones((4, 3)), binning=binning)
    assert cross.weighted.sum() == 0.0 and cross.n2 == 4


def test_separations_exactly_on_bin_edges_vectorised_path():
    # Pairs whose s and |mu| fall exactly on bin edges: the fast (s, |mu|) kernel for linear
    # bins must apply the same half-open rule as the brute-force reference (common practice:
    # s_k <= s < s_k+1, |mu| = 1 in the last bin).
    from corrpipe.paircount import Binning, count_pairs
    from corrpipe.paircount.reference import brute_force_counts

    rng = np.random.default_rng(4)
    base = rng.uniform(200.0, 300.0, (40, 3)).round(0)
    offsets = np.array([[0, 0, 5.0], [0, 3.0, 4.0], [0, 0, 10.0], [6.0, 8.0, 0.0],
                        [0, 0, 20.0], [12.0, 0, 16.0], [0, 0, 0.5]])
    pos = np.concatenate([base] + [base + o for o in offsets])
    w = rng.uniform(0.5, 1.5, pos.shape[0])
    binning = Binning.linear(0.0, 25.0, 5, n_mu=5)
    for los, box in (("z", 1000.0), ("z", None), ("midpoint", None)):
        got = count_pairs(pos, w, binning=binning, los=los, box_size=box, raw=True)
        ref = brute_force_counts(pos, w, binning=binning, los=los, box_size=box)
        assert np.array_equal(got.raw, ref["raw"]), (los, box)
        np.testing.assert_allclose(got.weighted, ref["weighted"], rtol=1e-12, atol=0)


@pytest.mark.parametrize("los", ["midpoint", "z"])
@pytest.mark.parametrize("cross", [False, True])
def test_regions_in_slabs_match_brute_force(los, cross):
    # reference: explicit enumeration (module docstring). Regions are slabs in x, so most
    # cells hold one region (the counter's whole-cell paths) and the cells on slab borders mix
    binning = BINNINGS["smu-abs"]
    pos, w, _ = _survey(21, 500)
    reg = np.minimum(((pos[:, 0] - 400.0) // 80.0).astype(np.int64), 2)
    kw, kw_ref = {}, {}
    if cross:
        pos2, w2, _ = _survey(22, 420)
        reg2 = np.minimum(((pos2[:, 0] - 400.0) // 80.0).astype(np.int64), 2)
        kw = dict(positions2=pos2, weights2=w2, regions2=reg2)
        kw_ref = dict(pos2=pos2, w2=w2, regions2=reg2)
    res = count_pairs(pos, w, binning=binning, los=los, raw=True, regions1=reg, n_regions=4,
                      n_units=5, refine=3, **kw)
    ref = brute_force_counts(pos, w, binning=binning, los=los, regions1=reg, n_regions=4,
                             **kw_ref)
    _assert_same(res, ref, with_regions=True)
    assert np.all(res.region_both[3] == 0) and np.all(res.region_one[3] == 0)  # empty region
    # the same count without regions gives bitwise the same weighted histogram
    kw.pop("regions2", None)
    plain = count_pairs(pos, w, binning=binning, los=los, n_units=5, refine=3, **kw)
    assert np.array_equal(plain.weighted, res.weighted)


def test_sort_cells_by_z_orders_each_cell_and_keeps_every_row():
    # Against numpy's sort (general library): within every cell z ascends, and each cell keeps
    # exactly its rows (x, y, z, w, region, original index) — including a cell of 9000 points,
    # which needs the extended Shell-sort gaps.
    from corrpipe.paircount import kernels

    rng = np.random.default_rng(8)
    sizes = np.array([0, 1, 2, 37, 9000, 5, 400])
    start = np.concatenate([[0], np.cumsum(sizes)])
    n = int(start[-1])
    cols = rng.uniform(0.0, 10.0, (4, n))
    cols[2, start[3]:start[3] + 10] = 3.0  # ties in z
    rs = rng.integers(0, 50, n).astype(np.int32)
    order = np.arange(n, dtype=np.int64)
    before = np.column_stack([cols.T, rs, order])
    xs, ys, zs, ws = (c.copy() for c in cols)
    kernels.sort_cells_by_z(start, xs, ys, zs, ws, rs, order)
    after = np.column_stack([xs, ys, zs, ws, rs, order])
    for a, b in zip(start[:-1], start[1:]):
        assert np.all(np.diff(zs[a:b]) >= 0)
        np.testing.assert_array_equal(np.sort(after[a:b], axis=0), np.sort(before[a:b], axis=0))
        # each row moved as a whole: its original index points back at its values
        np.testing.assert_array_equal(after[a:b, :4], before[order[a:b], :4])
