"""Storage of pair counts, bin definitions and input errors of the pair counter.

References: explicit enumeration (corrpipe.paircount.reference) for the counts being stored;
the storage round trip is checked against the in-memory values (common practice: a stored
result reads back bit for bit).
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from corrpipe.errors import CheckpointError, ConfigError, InputError
from corrpipe.paircount import Binning, PairCounts, count_pairs, split_random_rr


def _counts_with_everything():
    rng = np.random.default_rng(3)
    pos = rng.uniform(0, 200, (400, 3))
    w = rng.uniform(0.5, 1.5, 400)
    reg = rng.integers(0, 4, 400)
    binning = Binning.linear(0.0, 50.0, 5, n_mu=4)
    sets = [(pos[i::2], w[i::2], reg[i::2]) for i in range(2)]
    return split_random_rr(sets, binning=binning, los="y", box_size=200.0, raw=True, n_regions=4)


def test_hdf5_round_trip_restores_every_field(tmp_path):
    # common practice: what is stored reads back bit for bit
    counts = _counts_with_everything()
    path = tmp_path / "counts.h5"
    with h5py.File(path, "w") as h5:
        counts.to_hdf5(h5.create_group("RR"))
    with h5py.File(path, "r") as h5:
        back = PairCounts.from_hdf5(h5["RR"])
    for name in PairCounts.__dataclass_fields__:
        a, b = getattr(counts, name), getattr(back, name)
        if name == "edges":
            assert all(np.array_equal(x, y) for x, y in zip(a, b))
        elif isinstance(a, np.ndarray):
            assert np.array_equal(a, b) and a.dtype == b.dtype, name
        else:
            assert a == b, name
    assert back.norm == counts.norm and back.jackknife_norm(2) == counts.jackknife_norm(2)


def test_from_hdf5_refuses_foreign_group(tmp_path):
    with h5py.File(tmp_path / "x.h5", "w") as h5:
        grp = h5.create_group("DD")
        grp.create_dataset("weighted", data=np.ones(3))
        with pytest.raises(CheckpointError, match="does not hold pair counts"):
            PairCounts.from_hdf5(grp)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        (dict(positions1=np.zeros((5, 2))), r"shape \(N, 3\)"),
        (dict(positions1=np.array([[0, 0, 0], [np.nan, 1, 1.0]])), "row 1"),
        (dict(weights1=np.ones(3)), r"weights1 must have shape \(4,\)"),
        (dict(regions1=np.array([0, 1, 2, 7]), n_regions=3), r"\[0, 3\)"),
        (dict(los="sideways"), "line of sight"),
        (dict(box_size=60.0), "half the periodic box"),
        (dict(box_size=500.0, los="midpoint"), "fixed-axis"),
        (dict(positions2=np.zeros((3, 3)), regions1=np.zeros(4, int)), "both catalogues"),
        (dict(n_threads=0), "n_threads"),
    ],
)
def test_bad_input_gets_a_clear_error(kwargs, message):
    # common practice: bad input is refused with a message naming the argument
    args = dict(positions1=np.ones((4, 3)) * np.arange(4)[:, None])
    args.update(kwargs)
    pos = args.pop("positions1")
    with pytest.raises(InputError, match=message):
        count_pairs(pos, binning=Binning.linear(0.0, 40.0, 4, n_mu=2), **args)


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: Binning.linear(0.0, 10.0, 0), "n_s"),
        (lambda: Binning.from_edges([0.0, 2.0, 1.0]), "increase"),
        (lambda: Binning.log(0.0, 10.0, 4), "s_min > 0"),
        (lambda: Binning.from_edges([0.0, 1.0], [-0.5, 1.0]), r"\[0, 1\]"),
        (lambda: Binning("cylinder", ([0.0, 1.0],)), "mode"),
        (lambda: Binning.linear(0.0, 10.0, 2, n_mu=3, pi_max=4.0), "not both"),
    ],
)
def test_bad_binning_gets_a_clear_error(build, message):
    with pytest.raises(ConfigError, match=message):
        build()


def test_binning_shapes_and_radii():
    # elementary geometry: an (r_p, pi) count reaches sqrt(rp_max^2 + pi_max^2)
    b = Binning.linear(0.0, 30.0, 6, pi_max=40.0, n_pi=8)
    assert b.shape == (6, 8) and b.search_radius == pytest.approx(50.0)
    s = Binning.log(1.0, 100.0, 4, n_mu=5, mu_range="signed")
    np.testing.assert_allclose(s.edges[0], [1.0, 10**0.5, 10.0, 10**1.5, 100.0])
    np.testing.assert_allclose(s.edges[1], np.linspace(-1, 1, 6))
    assert s == Binning.log(1.0, 100.0, 4, n_mu=5, mu_range="signed")
