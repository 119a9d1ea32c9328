"""Pair counts and mock batches on a Dask LocalCluster of 2 single-threaded worker processes.

References: the threads engine (``count_pairs``) for identity of results on the same batching;
scipy.spatial.cKDTree.count_neighbors (scipy reference) for independent raw pair numbers.
"""

from __future__ import annotations

import dataclasses
import functools
import os
import signal
import socket
import time
from pathlib import Path

import numba
import numpy as np
import pytest
from scipy.spatial import cKDTree

pytest.importorskip("distributed")

from corrpipe.config import validate_section  # noqa: E402
from corrpipe.distributed import (  # noqa: E402
    EngineSettings,
    count_pairs_on,
    map_on_engine,
    open_engine,
    task_batches,
)
from corrpipe.errors import ConfigError, StageError  # noqa: E402
from corrpipe.paircount import Binning, count_pairs  # noqa: E402

UNITS_PER_TASK = 2
BINNING = Binning.linear(0.0, 70.0, 14, n_mu=10)


@pytest.fixture(scope="module")
def engine():
    settings = EngineSettings(kind="dask", n_workers=2, threads_per_worker=1,
                              units_per_task=UNITS_PER_TASK, connect_timeout=20.0)
    with open_engine(settings) as client:
        yield settings, client


@pytest.fixture(scope="module")
def survey():
    """Invented demo catalogue: 60k points in a 500 Mpc/h cube offset from the observer."""
    rng = np.random.default_rng(20261201)
    n = 60_000
    pos = rng.uniform(0.0, 500.0, (n, 3)) + np.array([800.0, -250.0, -250.0])
    weights = rng.uniform(0.5, 1.5, n)
    regions = (pos[:, 1] > 0).astype(np.int64) + 2 * (pos[:, 2] > 0)
    return pos, weights, regions


@pytest.fixture(scope="module")
def reference(survey):
    pos, weights, regions = survey
    threads = EngineSettings(kind="threads", units_per_task=UNITS_PER_TASK)
    return count_pairs_on(threads, pos, weights, binning=BINNING, regions1=regions, n_regions=4,
                          raw=True)


def _assert_identical(a, b):
    assert np.array_equal(a.weighted, b.weighted)
    assert np.array_equal(a.raw, b.raw)
    if a.region_both is not None:
        assert np.array_equal(a.region_both, b.region_both)
        assert np.array_equal(a.region_one, b.region_one)
    assert (a.sum_w1, a.sum_w1_sq, a.n1) == (b.sum_w1, b.sum_w1_sq, b.n1)
    assert a.meta["n_pairs"] == b.meta["n_pairs"]


def test_task_batches_are_fixed_blocks():
    # common practice: fixed blocks make a resumed reduction round like a fresh one
    assert task_batches(10, 4) == [[0, 1, 2, 3], [4, 5, 6, 7], [8, 9]]
    assert task_batches(10, 4, done={0, 1, 2, 3, 5}) == [[4, 6, 7], [8, 9]]
    assert task_batches(0, 4) == []


def test_workers_use_one_numba_thread(engine):
    # common practice: 2 workers x 1 thread must not oversubscribe 2 cores
    settings, client = engine
    threads = client.run(lambda: numba.config.NUMBA_NUM_THREADS)
    assert sorted(threads.values()) == [1, 1]


def test_dask_counts_identical_to_threads_engine(engine, survey, reference):
    # reference: the threads engine with the same units_per_task (bitwise equal by design)
    settings, client = engine
    pos, weights, regions = survey
    result = count_pairs_on(settings, pos, weights, binning=BINNING, regions1=regions,
                            n_regions=4, raw=True, client=client)
    _assert_identical(result, reference)
    assert result.meta["n_pairs"] > 1_000_000


def test_periodic_cross_count_identical_and_matches_kdtree(engine):
    # references: threads engine (identity); scipy.spatial.cKDTree.count_neighbors with
    # boxsize (scipy reference) for the raw cross-pair numbers per s bin
    settings, client = engine
    rng = np.random.default_rng(5)
    box = 200.0
    a = rng.uniform(0, box, (4000, 3))
    b = rng.uniform(0, box, (5000, 3))
    binning = Binning.linear(0.0, 40.0, 8)
    kwargs = dict(binning=binning, box_size=box, los="z", raw=True)
    plan = dict(work_units=40, units_per_task=3)
    local = count_pairs_on(EngineSettings(kind="threads", **plan), a, None, b, None, **kwargs)
    remote = count_pairs_on(dataclasses.replace(settings, **plan), a, None, b, None,
                            client=client, **kwargs)
    _assert_identical(remote, local)
    assert 10 < remote.meta["n_units"] <= 40
    tree_a, tree_b = cKDTree(a, boxsize=box), cKDTree(b, boxsize=box)
    cumulative = tree_a.count_neighbors(tree_b, binning.edges[0], cumulative=True)
    # corrpipe bins s^2 < edge^2, cKDTree counts s <= edge: equal for continuous random points
    assert np.array_equal(remote.raw, np.diff(cumulative))


@pytest.mark.slow
def test_killed_worker_still_finishes_with_identical_counts(engine, survey, reference, tmp_path):
    # reference: threads engine; Dask reschedules the tasks of a lost worker (its nanny
    # restarts it) and the scattered catalogue survives on the other worker
    settings, client = engine
    pos, weights, regions = survey
    killed = {}
    pids = client.run(os.getpid)  # {worker address: process id}

    def kill_a_busy_worker(part):
        if killed:
            return
        busy = {addr: keys for addr, keys in client.processing().items() if keys}
        assert busy, "no task in flight to interrupt; enlarge the test catalogue"
        addr = sorted(busy)[0]
        os.kill(pids[addr], signal.SIGKILL)
        killed["addr"] = addr

    result = count_pairs_on(settings, pos, weights, binning=BINNING, regions1=regions,
                            n_regions=4, raw=True, client=client,
                            progress_path=tmp_path / "dd.progress.h5",
                            on_partial=kill_a_busy_worker)
    assert killed, "the worker was never killed"
    _assert_identical(result, reference)
    assert killed["addr"] not in client.scheduler_info()["workers"]
    client.wait_for_workers(2, timeout=120)  # the nanny brings the worker back for later tests


@pytest.mark.slow
def test_losing_every_worker_rescatters_and_finishes_identical(engine, survey, reference):
    # reference: threads engine; scattered data has no lineage in Dask (distributed docs,
    # "Data Locality"/scatter), so the engine must scatter the catalogue again itself
    settings, client = engine
    pos, weights, regions = survey
    client.wait_for_workers(2, timeout=120)
    pids = client.run(os.getpid)
    killed = []

    def kill_every_worker(part):
        if not killed:
            for pid in pids.values():
                os.kill(pid, signal.SIGKILL)
            killed.append(len(pids))

    result = count_pairs_on(settings, pos, weights, binning=BINNING, regions1=regions,
                            n_regions=4, raw=True, client=client, on_partial=kill_every_worker)
    assert killed == [2]
    _assert_identical(result, reference)
    assert not set(pids) & set(client.scheduler_info()["workers"])
    client.wait_for_workers(2, timeout=120)


@pytest.mark.slow
def test_aborted_run_resumes_from_sidecar(engine, survey, reference, tmp_path):
    # reference: threads engine; the resumed run must redo only the batches not saved
    settings, client = engine
    pos, weights, regions = survey
    sidecar = tmp_path / "dd.progress.h5"
    seen = []

    def abort_after_three(part):
        seen.append(part)
        if len(seen) == 3:
            raise KeyboardInterrupt("user stopped the run")

    kwargs = dict(binning=BINNING, regions1=regions, n_regions=4, raw=True, client=client,
                  progress_path=sidecar)
    with pytest.raises(KeyboardInterrupt):
        count_pairs_on(settings, pos, weights, on_partial=abort_after_three, **kwargs)
    saved = sorted(int(u) for p in seen for u in p.unit_ids)
    copy = tmp_path / "copy.progress.h5"
    copy.write_bytes(sidecar.read_bytes())

    # the threads engine resumes the same sidecar; its batches of the remaining units group
    # the sums differently, so agreement is to rounding (common practice: ~1e-15 relative)
    local = count_pairs_on(EngineSettings(kind="threads", units_per_task=UNITS_PER_TASK), pos,
                           weights, **{**kwargs, "client": None, "progress_path": copy})
    np.testing.assert_allclose(local.weighted, reference.weighted, rtol=1e-12, atol=0)
    assert np.array_equal(local.raw, reference.raw)

    resumed_units = []
    result = count_pairs_on(settings, pos, weights, **kwargs,
                            on_partial=lambda p: resumed_units.extend(p.unit_ids.tolist()))
    n_units = result.meta["n_units"]
    assert sorted(resumed_units) == sorted(set(range(n_units)) - set(saved))
    _assert_identical(result, reference)


def _mock_box(seed: int, box: float = 150.0, n: int = 3000) -> np.ndarray:
    return np.random.default_rng(seed).uniform(0.0, box, (n, 3))


def test_mock_batch_one_task_per_mock_in_input_order(engine):
    # references: in-process threads engine (identity, same batching) and
    # scipy.spatial.cKDTree.count_neighbors with boxsize (scipy reference) for raw counts
    settings, client = engine
    box = 150.0
    binning = Binning.linear(0.0, 30.0, 6)
    fn = functools.partial(count_pairs, binning=binning, box_size=box, raw=True,
                           units_per_batch=UNITS_PER_TASK)
    mocks = [_mock_box(seed, box) for seed in (11, 12, 13, 14)]
    remote = map_on_engine(settings, fn, mocks, client=client)
    local = map_on_engine(EngineSettings(kind="threads"), fn, mocks)
    assert len(remote) == len(mocks)
    for pos, r, loc in zip(mocks, remote, local):
        _assert_identical(r, loc)
        tree = cKDTree(pos, boxsize=box)
        # ordered pairs; self-pairs sit at s = 0 = the first edge and drop out of the diff
        ordered = np.diff(tree.count_neighbors(tree, binning.edges[0], cumulative=True))
        assert np.array_equal(r.raw, ordered // 2)


def test_mock_batch_names_the_failing_item(engine):
    # common practice: a failing mock is reported by its position in the batch
    settings, client = engine
    fn = functools.partial(count_pairs, binning=Binning.linear(0.0, 30.0, 3), box_size=150.0)
    items = [_mock_box(1), _mock_box(2), np.zeros((10, 2))]
    with pytest.raises(StageError, match=r"item 2 \(array of shape \(10, 2\)\).*InputError"):
        map_on_engine(settings, fn, items, client=client)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_fails_within_timeout():
    # common practice: a dead address must fail fast with a readable error, not hang
    address = f"tcp://127.0.0.1:{_free_port()}"
    settings = EngineSettings(kind="dask", scheduler=address, connect_timeout=2.0)
    started = time.perf_counter()
    with pytest.raises(ConfigError, match="cannot reach the Dask scheduler") as info:
        with open_engine(settings):
            pass
    assert time.perf_counter() - started < 10.0
    assert address in str(info.value) and "connect_timeout" in str(info.value)


def test_missing_scheduler_file_is_a_config_error(tmp_path):
    # common practice: name the key and the path
    settings = EngineSettings(kind="dask", scheduler_file=str(tmp_path / "sched.json"))
    with pytest.raises(ConfigError, match="scheduler_file.*does not exist"):
        with open_engine(settings):
            pass


def test_engine_table_validation():
    # common practice: config values are checked on load, naming the key
    ok = validate_section(EngineSettings, {"kind": "dask", "scheduler": "tcp://node1:8786",
                                           "n_workers": 4}, "engine", "run.toml", Path("."))
    assert ok.kind == "dask" and ok.n_workers == 4 and ok.threads_per_worker == 1
    with pytest.raises(ConfigError, match=r"\[engine\] kind"):
        validate_section(EngineSettings, {"kind": "spark"}, "engine", "run.toml", Path("."))
    with pytest.raises(ConfigError, match="both 'scheduler' and 'scheduler_file'"):
        validate_section(EngineSettings, {"scheduler": "tcp://a:1", "scheduler_file": "s.json"},
                         "engine", "run.toml", Path("."))
    with pytest.raises(ConfigError, match="units_per_task"):
        validate_section(EngineSettings, {"units_per_task": -1}, "engine", "run.toml", Path("."))
    with pytest.raises(ConfigError, match="connect_timeout"):
        validate_section(EngineSettings, {"connect_timeout": 0.0}, "engine", "run.toml",
                         Path("."))


def test_slurm_example_config_engine_table_is_valid():
    # common practice: a shipped example must at least pass the config checks
    from corrpipe.config import tomllib

    path = Path(__file__).resolve().parents[2] / "configs" / "cluster_slurm.toml"
    table = tomllib.loads(path.read_text())["engine"]
    engine = validate_section(EngineSettings, table, "engine", str(path), path.parent)
    assert (engine.kind, engine.cluster, engine.n_workers) == ("dask", "slurm", 16)


def test_batch_system_cluster_without_jobqueue_says_what_to_install():
    # common practice: a missing optional package is named with its install command
    try:
        import dask_jobqueue  # noqa: F401
    except ImportError:
        pass
    else:
        pytest.skip("dask-jobqueue is installed; this checks the message when it is not")
    settings = EngineSettings(kind="dask", cluster="slurm", n_workers=2)
    with pytest.raises(ConfigError, match="pip install dask-jobqueue"):
        with open_engine(settings):
            pass
