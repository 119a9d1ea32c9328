"""Interrupted and resumed counts, thread counts and unit subsets all give the same result.

Reference: the uninterrupted single call of count_pairs on the same inputs (restart
equivalence, common practice for resumable stages), which is itself checked against explicit
enumeration in tests/unit/test_paircount_exact.py. Results must be bitwise identical.
"""

from __future__ import annotations

import logging

import h5py
import numpy as np
import pytest

from corrpipe.paircount import (
    Binning,
    CountStopped,
    OrderedReduction,
    count_pairs,
    count_units,
    prepare_count,
    reduce_partials,
)

BINNING = Binning.linear(0.0, 60.0, 12, n_mu=10)


@pytest.fixture(scope="module")
def catalogue():
    """Invented points in a 300 Mpc/h cube, offset from the observer."""
    rng = np.random.default_rng(99)
    pos = rng.uniform(0, 300, (6000, 3)) + np.array([500.0, 0.0, 0.0])
    return pos, rng.uniform(0.5, 1.5, 6000), rng.integers(0, 6, 6000)


def _same(a, b):
    assert np.array_equal(a.weighted, b.weighted)
    for name in ("raw", "region_both", "region_one"):
        x, y = getattr(a, name), getattr(b, name)
        assert (x is None and y is None) or np.array_equal(x, y), name


def test_interrupted_count_resumes_with_only_missing_units(catalogue, tmp_path):
    pos, w, reg = catalogue
    opts = dict(binning=BINNING, regions1=reg, n_regions=6, raw=True, n_units=24,
                units_per_batch=4)
    full = count_pairs(pos, w, **opts)
    sidecar = tmp_path / "counts.progress.h5"
    with pytest.raises(CountStopped, match="resume"):
        count_pairs(pos, w, progress_path=sidecar, stop_after_units=8, **opts)
    with h5py.File(sidecar, "r") as h5:
        done = [h5[g]["unit_ids"][()] for g in h5 if h5[g].attrs.get("done")]
    assert sum(len(d) for d in done) == 8
    # a half-written batch (no done mark) is ignored on resume
    with h5py.File(sidecar, "a") as h5:
        grp = h5.create_group("batch_000016")
        grp.create_dataset("unit_ids", data=np.arange(16, 20))
        grp.create_dataset("weighted", data=np.full(BINNING.shape[0] * BINNING.shape[1], 1e9))
    resumed = count_pairs(pos, w, progress_path=sidecar, **opts)
    _same(full, resumed)
    assert resumed.meta["n_pairs"] == full.meta["n_pairs"]


def test_sidecar_of_other_inputs_is_replaced(catalogue, tmp_path, caplog):
    pos, w, _ = catalogue
    sidecar = tmp_path / "p.h5"
    opts = dict(binning=BINNING, n_units=12, units_per_batch=2)
    with pytest.raises(CountStopped):
        count_pairs(pos, w, progress_path=sidecar, stop_after_units=2, **opts)
    with caplog.at_level(logging.WARNING):
        other = count_pairs(pos, w * 2.0, progress_path=sidecar, **opts)
    assert "different count" in caplog.text
    direct = count_pairs(pos, w * 2.0, **opts)
    _same(other, direct)
    # a damaged sidecar is replaced as well
    sidecar.write_bytes(b"not an hdf5 file")
    with caplog.at_level(logging.WARNING):
        again = count_pairs(pos, w * 2.0, progress_path=sidecar, **opts)
    assert "cannot be read" in caplog.text
    _same(again, direct)


def test_thread_count_does_not_change_the_result(catalogue):
    pos, w, reg = catalogue
    opts = dict(binning=BINNING, regions1=reg, n_regions=6, raw=True, los="bisector")
    one = count_pairs(pos, w, n_threads=1, **opts)
    two = count_pairs(pos, w, n_threads=2, **opts)
    _same(one, two)


def test_units_counted_in_any_grouping_reduce_to_the_same_counts(catalogue):
    # what a distributed engine does: count arbitrary groups, reduce in unit order
    pos, w, _ = catalogue
    half = len(pos) // 2
    prepared = prepare_count(pos[:half], w[:half], pos[half:], w[half:], binning=BINNING,
                             raw=True, n_units=10)
    ids = np.arange(prepared.n_units)
    whole = reduce_partials(prepared, [count_units(prepared, ids)])
    rng = np.random.default_rng(1)
    shuffled = rng.permutation(ids)
    pieces = [count_units(prepared, shuffled[i:i + 3]) for i in range(0, ids.size, 3)]
    regrouped = reduce_partials(prepared, pieces[::-1])
    np.testing.assert_allclose(regrouped.weighted, whole.weighted, rtol=1e-12, atol=0)
    assert np.array_equal(regrouped.raw, whole.raw)
    singles = reduce_partials(prepared, [count_units(prepared, [i]) for i in ids])
    direct = count_pairs(pos[:half], w[:half], pos[half:], w[half:], binning=BINNING, raw=True,
                         n_units=10, units_per_batch=1)
    _same(singles, direct)
    from corrpipe.errors import StageError

    with pytest.raises(StageError, match="missing"):
        reduce_partials(prepared, pieces[1:])


def test_running_reduction_in_any_arrival_order_equals_reduce_partials(catalogue):
    # reference: reduce_partials on the same partials (sorted by first unit); bitwise equal
    pos, w, reg = catalogue
    prepared = prepare_count(pos, w, binning=BINNING, regions1=reg, n_regions=6, raw=True,
                             n_units=12)
    ids = np.arange(prepared.n_units)
    pieces = [count_units(prepared, ids[i:i + 2]) for i in range(0, ids.size, 2)]
    expected = reduce_partials(prepared, pieces)
    order = np.random.default_rng(3).permutation(len(pieces))
    running = OrderedReduction(prepared, [int(p.unit_ids[0]) for p in pieces])
    for k in order:
        running.add(pieces[k])
    _same(running.result(), expected)
    from corrpipe.errors import StageError

    short = OrderedReduction(prepared, [int(p.unit_ids[0]) for p in pieces])
    for piece in pieces[:-1]:
        short.add(piece)
    with pytest.raises(StageError, match="missing"):
        short.result()
