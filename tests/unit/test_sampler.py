"""emcee driver: toy posterior with a known answer, seeds, resume, restart and the cap."""

from __future__ import annotations

import emcee
import h5py
import numpy as np
import pytest

from corrpipe.fit.sampler import CHAIN_GROUP, run_chain

MEAN = np.array([1.0, -2.0])
COV = np.array([[0.04, 0.018], [0.018, 0.09]])
ICOV = np.linalg.inv(COV)


def gauss(x):
    d = x - MEAN
    return -0.5 * d @ ICOV @ d


def test_toy_gaussian_posterior():
    # Known answer (common practice, STYLE.md 14): a 2-D Gaussian's mean and covariance are
    # recovered; acceptance of the stretch move on a Gaussian is ~0.4-0.7 (Goodman & Weare
    # 2010 / emcee docs [from memory]).
    res = run_chain(gauss, np.zeros(2), n_walkers=16, seed=3, max_steps=3000, check_every=250,
                    init_scale=0.1, progress=False)
    x = res.samples()
    n_eff = res.n_steps * 16 / np.max(res.tau)
    assert res.converged
    assert np.all(np.abs(x.mean(0) - MEAN) < 5 * np.sqrt(np.diag(COV) / n_eff))
    np.testing.assert_allclose(np.cov(x.T), COV, rtol=0.15, atol=0.004)
    assert 0.4 < res.acceptance < 0.8


def test_same_seed_same_chain_and_cap_flag():
    # common practice: a seed fixes the chain; hitting max_steps is flagged, not hidden
    a = run_chain(gauss, np.zeros(2), n_walkers=8, seed=11, max_steps=60, check_every=30,
                  progress=False)
    b = run_chain(gauss, np.zeros(2), n_walkers=8, seed=11, max_steps=60, check_every=30,
                  progress=False)
    np.testing.assert_array_equal(a.chain, b.chain)
    assert not a.converged and "NOT converged" in a.note


class _Interrupt:
    def __init__(self, after):
        self.calls, self.after = 0, after

    def __call__(self, x):
        self.calls += 1
        if self.calls > self.after:
            raise KeyboardInterrupt
        return gauss(x)


def test_interrupted_chain_resumes_to_the_same_result(tmp_path):
    # STYLE.md 14: interrupted and resumed equals uninterrupted (the progress file, in emcee's
    # HDF5 backend layout, holds every finished chunk of steps and the generator state).
    kw = dict(n_walkers=8, seed=5, max_steps=300, check_every=100, tau_factor=1e6,
              progress=False, model_hash="toy")
    full = run_chain(gauss, np.zeros(2), **kw)
    path = tmp_path / "fit.progress.h5"
    with pytest.raises(KeyboardInterrupt):
        run_chain(_Interrupt(8 + 8 * 130 + 3), np.zeros(2), progress_path=path, **kw)
    with h5py.File(path, "r") as f:
        stopped_at = int(f[CHAIN_GROUP].attrs["iteration"])
    assert stopped_at == 100  # the last finished chunk (check_every = 100)
    stored = emcee.backends.HDFBackend(str(path), name=CHAIN_GROUP, read_only=True)
    np.testing.assert_array_equal(stored.get_chain(), full.chain[:100])  # emcee reads it
    resumed = run_chain(gauss, np.zeros(2), progress_path=path, **kw)
    assert resumed.resumed_from == stopped_at
    np.testing.assert_array_equal(resumed.chain, full.chain)
    np.testing.assert_array_equal(resumed.log_prob, full.log_prob)


def test_mismatched_progress_file_restarts(tmp_path):
    # brief: on reopen check (n_walkers, n_dim, settings hash); restart cleanly on mismatch
    path = tmp_path / "p.h5"
    kw = dict(seed=5, max_steps=40, check_every=20, progress=False, progress_path=path)
    run_chain(gauss, np.zeros(2), n_walkers=8, model_hash="one", **kw)
    other = run_chain(gauss, np.zeros(2), n_walkers=8, model_hash="two", **kw)
    assert other.resumed_from == 0 and "other fit settings" in other.note
    wider = run_chain(gauss, np.zeros(2), n_walkers=10, model_hash="two", **kw)
    assert wider.resumed_from == 0 and "shape" in wider.note
    again = run_chain(gauss, np.zeros(2), n_walkers=10, model_hash="two", **kw)
    assert again.resumed_from == 40 and again.n_steps == 40
    path.write_bytes(b"not an hdf5 file")
    fresh = run_chain(gauss, np.zeros(2), n_walkers=10, model_hash="two", **kw)
    assert fresh.resumed_from == 0 and "unreadable" in fresh.note
