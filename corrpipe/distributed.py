"""Execution engines: pair counts and mock batches on local threads or a Dask cluster.

The ``[engine]`` config table chooses where the heavy work runs:

- ``kind = "threads"`` (default): numba threads of this process (:func:`count_pairs`).
- ``kind = "dask"``: tasks on a Dask distributed cluster — a running scheduler given by
  ``scheduler`` (address) or ``scheduler_file`` (written by ``dask scheduler`` or dask-mpi), or
  a cluster started for the run (``cluster = "local"`` on this machine, or a batch-system
  cluster through dask-jobqueue).

A Dask count runs the pair counter's three public steps: :func:`prepare_count` on the client,
the prepared arrays scattered once to every worker, one task per batch of work units calling
:func:`count_units` (the same numba kernel), and :func:`reduce_partials` on the client, which
sums the partial histograms in unit order. Batches are fixed blocks of ``units_per_task``
consecutive units, the grouping the threads engine uses for the same batch size, so both
engines return bitwise identical counts. Each partial is saved to the progress sidecar as it
arrives: a worker lost mid-run costs only its unfinished tasks (Dask reruns them elsewhere) and
an aborted run resumes from the sidecar.

Dask is optional: it is imported only when a Dask engine is opened.
"""

from __future__ import annotations

import contextlib
import logging
import os
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numba
import numpy as np

from corrpipe.errors import ConfigError, CorrpipeError, StageError
from corrpipe.paircount.binning import Binning
from corrpipe.paircount.engine import (
    PartialCounts,
    PreparedCount,
    count_pairs,
    count_units,
    prepare_count,
    reduce_partials,
)
from corrpipe.paircount.result import PairCounts
from corrpipe.settings import setting
from corrpipe.terminal import show_bars

__all__ = [
    "ENGINE_KINDS",
    "CLUSTER_KINDS",
    "EngineSettings",
    "open_engine",
    "count_pairs_on",
    "map_on_engine",
    "task_batches",
]

ENGINE_KINDS = ("threads", "dask")
CLUSTER_KINDS = ("local", "slurm", "pbs", "sge", "lsf")
_JOBQUEUE_CLASSES = {"slurm": "SLURMCluster", "pbs": "PBSCluster", "sge": "SGECluster",
                     "lsf": "LSFCluster"}
_log = logging.getLogger(__name__)
_BATCH_MEMORY = 256 * 2**20  # bytes of per-unit histograms one task may hold at once

# One numba parallel region at a time per worker process: numba's default (workqueue) threading
# layer must not be entered from two threads at once, and a worker may run several Dask threads.
_KERNEL_LOCK = threading.Lock()


@dataclass(frozen=True)
class EngineSettings:
    """Config table ``[engine]``: where pair counts and mock batches run."""

    kind: str = setting("threads", "execution engine: numba threads in this process, or a Dask "
                        "distributed cluster", choices=ENGINE_KINDS)
    scheduler: str = setting("", "address of a running Dask scheduler, e.g. "
                             "'tcp://node17:8786' (empty: use scheduler_file, or start a cluster)")
    scheduler_file: str = setting("", "JSON file written by a running Dask scheduler "
                                  "('dask scheduler --scheduler-file', dask-mpi); empty = none",
                                  path=True)
    cluster: str = setting("local", "cluster to start for the run when no scheduler is given: "
                           "worker processes on this machine, or batch jobs via dask-jobqueue",
                           choices=CLUSTER_KINDS)
    n_workers: int = setting(0, "worker processes (or batch jobs) of a started cluster; 0 = one "
                             "per threads_per_worker cores of this machine", low=0, high=100000)
    threads_per_worker: int = setting(1, "numba threads each worker uses for one task; a worker "
                                      "runs one corrpipe task at a time", low=1, high=1024)
    memory_per_worker: str = setting("", "memory of each started worker, e.g. '4GiB' (empty: an "
                                     "equal share of this machine; required for batch jobs "
                                     "unless set in dask's jobqueue config)")
    queue: str = setting("", "batch-system queue or partition of the worker jobs (empty: the "
                         "site default or dask's jobqueue config)")
    account: str = setting("", "batch-system account or project charged for the worker jobs")
    walltime: str = setting("", "wall-clock limit of each worker job, e.g. '02:00:00'")
    job_directives: tuple[str, ...] = setting((), "extra batch-script directives of the worker "
                                              "jobs, e.g. ['--constraint=cpu']")
    job_prologue: tuple[str, ...] = setting((), "shell lines run in each worker job before the "
                                            "worker starts, e.g. ['module load python']")
    connect_timeout: float = setting(10.0, "seconds to wait when connecting to a scheduler "
                                     "before giving up with an error", unit="s", low=0.5,
                                     high=3600.0)
    worker_timeout: float = setting(120.0, "seconds to wait for the first worker to join "
                                    "before giving up with an error (batch jobs may queue)",
                                    unit="s", low=1.0, high=86400.0)
    work_units: int = setting(0, "target number of pair-count work units a count is cut into "
                              "(the same on both engines); 0 = the pair counter's default. "
                              "Give a cluster several units per worker thread", low=0,
                              high=10_000_000)
    units_per_task: int = setting(0, "pair-count work units per task, and per batch of the "
                                  "threads engine; 0 = automatic (threads: 4 per thread; Dask: "
                                  "about 4 tasks per worker thread of the cluster). Equal "
                                  "explicit values give bitwise equal counts on both engines",
                                  low=0, high=100000)

    def __post_init__(self) -> None:
        for name, allowed in (("kind", ENGINE_KINDS), ("cluster", CLUSTER_KINDS)):
            if getattr(self, name) not in allowed:
                raise ConfigError(f"[engine] {name} = {getattr(self, name)!r} is not known; "
                                  f"choose one of {', '.join(map(repr, allowed))}")

    def validate(self) -> None:
        """Cross-field checks (run by the config loader and by :func:`open_engine`)."""
        if self.scheduler and self.scheduler_file:
            raise ConfigError("gives both 'scheduler' and 'scheduler_file'; keep one of them "
                              "(the address of a running scheduler or its scheduler file)")

    def batch_size(self, threads: int | None = None) -> int:
        """Work units per task (or threads-engine batch) for ``threads`` worker threads."""
        if self.units_per_task > 0:
            return int(self.units_per_task)
        return 4 * int(threads if threads is not None else self.threads_per_worker)


# ---------------------------------------------------------------------------- opening an engine
@contextlib.contextmanager
def open_engine(settings: EngineSettings) -> Iterator[Any]:
    """Connect to (or start) the engine of ``settings`` for the duration of a ``with`` block.

    Parameters
    ----------
    settings : EngineSettings

    Yields
    ------
    distributed.Client or None
        The Dask client (``kind="dask"``); None for the threads engine. A cluster started here
        is closed on leaving the block; a scheduler given by address or file is left running.

    Raises
    ------
    ConfigError
        Dask is not installed, the scheduler cannot be reached within ``connect_timeout``, the
        scheduler file is missing, or no worker joins within ``worker_timeout``.
    """
    settings.validate()
    if settings.kind == "threads":
        yield None
        return
    try:
        import distributed
    except ImportError as exc:
        message = ("[engine] kind = 'dask' needs the Dask distributed package, which is not "
                   "installed; install it with: pip install 'dask[distributed]' (or use "
                   "kind = 'threads')")
        raise ConfigError(message) from exc

    with contextlib.ExitStack() as stack:
        cluster = None
        if settings.scheduler:
            client = _connect(distributed, settings.scheduler, settings,
                              f"[engine] scheduler = {settings.scheduler!r}")
        elif settings.scheduler_file:
            path = Path(settings.scheduler_file).expanduser()
            if not path.is_file():
                raise ConfigError(
                    f"[engine] scheduler_file = {str(path)!r} does not exist; start the "
                    "scheduler first (dask scheduler --scheduler-file FILE, or dask-mpi "
                    "--scheduler-file FILE) or correct the path")
            client = _connect(distributed, None, settings,
                              f"[engine] scheduler_file = {str(path)!r}", scheduler_file=str(path))
        else:
            cluster = _start_cluster(distributed, settings)
            stack.callback(cluster.close)
            client = _connect(distributed, cluster, settings, f"the {settings.cluster} cluster")
        stack.callback(client.close)
        _wait_for_workers(client, settings, cluster)
        _log.info("Dask engine: scheduler %s, %d workers, dashboard %s", client.scheduler.address,
                  len(client.scheduler_info()["workers"]), client.dashboard_link)
        yield client


def _connect(distributed, address, settings: EngineSettings, where: str, scheduler_file=None):
    started = time.perf_counter()
    try:
        return distributed.Client(address, scheduler_file=scheduler_file,
                                  timeout=settings.connect_timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        waited = time.perf_counter() - started
        message = (f"cannot reach the Dask scheduler given by {where} (gave up after "
                   f"{waited:.1f} s, connect_timeout = {settings.connect_timeout:g} s): {exc}. "
                   "Check that the scheduler is running and the address (protocol://host:port) "
                   "is right, raise [engine] connect_timeout for a slow network, or leave "
                   "scheduler empty to start a cluster for the run")
        raise ConfigError(message) from exc


def _wait_for_workers(client, settings: EngineSettings, cluster) -> None:
    try:
        client.wait_for_workers(1, timeout=settings.worker_timeout)
    except (TimeoutError, OSError) as exc:
        origin = ("the batch jobs may still be queued or failed to start; check the batch "
                  "system's queue and the job logs" if cluster is not None else
                  "start workers against it (dask worker ADDRESS)")
        message = (f"no Dask worker joined the scheduler within worker_timeout = "
                   f"{settings.worker_timeout:g} s; {origin}, or raise [engine] worker_timeout")
        raise ConfigError(message) from exc


def _default_workers(settings: EngineSettings) -> int:
    if settings.n_workers > 0:
        return settings.n_workers
    return max(1, (os.cpu_count() or 1) // settings.threads_per_worker)


def _start_cluster(distributed, settings: EngineSettings):
    threads = settings.threads_per_worker
    n_workers = _default_workers(settings)
    env = {"NUMBA_NUM_THREADS": str(threads), "OMP_NUM_THREADS": str(threads)}
    if settings.cluster == "local":
        options = dict(n_workers=n_workers, threads_per_worker=1, processes=True,
                       dashboard_address=":0", env=env)
        if settings.memory_per_worker:
            options["memory_limit"] = settings.memory_per_worker
        try:
            return distributed.LocalCluster(**options)
        except (OSError, TimeoutError, ValueError, TypeError) as exc:
            message = (f"cannot start a local Dask cluster of {n_workers} workers x {threads} "
                       f"threads ([engine] n_workers, threads_per_worker, memory_per_worker): "
                       f"{exc}")
            raise ConfigError(message) from exc
    return _start_jobqueue(settings, n_workers, env)


def _start_jobqueue(settings: EngineSettings, n_workers: int, env: dict):
    """Batch-system workers through dask-jobqueue (one worker process per job)."""
    try:
        import dask_jobqueue
    except ImportError as exc:
        message = (f"[engine] cluster = {settings.cluster!r} needs the dask-jobqueue package, "
                   "which is not installed; install it with: pip install dask-jobqueue "
                   "(or start the scheduler yourself and set [engine] scheduler_file)")
        raise ConfigError(message) from exc
    cls = getattr(dask_jobqueue, _JOBQUEUE_CLASSES[settings.cluster])
    options: dict[str, Any] = dict(cores=settings.threads_per_worker, processes=1)
    for key, value in (("memory", settings.memory_per_worker), ("queue", settings.queue),
                       ("account", settings.account), ("walltime", settings.walltime)):
        if value:
            options[key] = value
    if settings.job_directives:
        options["job_extra_directives"] = list(settings.job_directives)
    options["job_script_prologue"] = (list(settings.job_prologue)
                                      + [f"export {k}={v}" for k, v in env.items()])
    try:
        cluster = cls(**options)
        cluster.scale(jobs=n_workers)
    except (ValueError, TypeError, OSError, RuntimeError) as exc:
        message = (f"cannot set up the {settings.cluster} worker jobs through dask-jobqueue "
                   f"({type(exc).__name__}: {exc}); check [engine] memory_per_worker, queue, "
                   "account, walltime and job_directives, or dask's jobqueue config")
        raise ConfigError(message) from exc
    return cluster


# ---------------------------------------------------------------------------- worker-side tasks
def _count_task(prepared: PreparedCount, unit_ids: list, threads: int) -> PartialCounts:
    """Count some work units in a worker with at most ``threads`` numba threads."""
    with _KERNEL_LOCK:
        previous = numba.get_num_threads()
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
        try:
            return count_units(prepared, unit_ids)
        finally:
            numba.set_num_threads(previous)


def _item_task(fn: Callable, item: Any, threads: int) -> Any:
    """Run one mock-batch item in a worker with at most ``threads`` numba threads."""
    with _KERNEL_LOCK:
        previous = numba.get_num_threads()
        numba.set_num_threads(max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS)))
        try:
            return fn(item)
        finally:
            numba.set_num_threads(previous)


# ---------------------------------------------------------------------------- pair counts
def task_batches(n_units: int, batch_size: int, done=()) -> list[list[int]]:
    """Fixed blocks of ``batch_size`` consecutive units, less the units already ``done``.

    The blocks do not depend on which units are done, so a resumed count groups (and therefore
    rounds) its partial sums like an uninterrupted one.

    Returns
    -------
    list of list of int
        Non-empty batches in unit order.
    """
    done = set(int(u) for u in done)
    size = max(1, int(batch_size))
    batches = []
    for lo in range(0, int(n_units), size):
        batch = [u for u in range(lo, min(lo + size, int(n_units))) if u not in done]
        if batch:
            batches.append(batch)
    return batches


def _memory_cap(prepared: PreparedCount) -> int:
    per_unit = 8 * prepared.n_flat_bins * (1 + int(prepared.raw) + 2 * prepared.n_regions)
    return max(1, _BATCH_MEMORY // max(1, per_unit))


def count_pairs_on(settings: EngineSettings, positions1, weights1=None, positions2=None,
                   weights2=None, *, binning: Binning, los: str = "midpoint",
                   box_size: float | None = None, regions1=None, regions2=None,
                   n_regions: int | None = None, raw: bool = False, progress: bool = False,
                   progress_path=None, client=None, n_threads: int | None = None,
                   on_partial: Callable[[PartialCounts], None] | None = None) -> PairCounts:
    """Weighted pair counts on the engine of ``settings`` (same semantics as ``count_pairs``).

    Parameters
    ----------
    settings : EngineSettings
        Engine choice; ``work_units`` (the plan) and ``units_per_task`` (the grouping of units)
        apply to both engines, so equal settings give bitwise equal counts.
    positions1, weights1, positions2, weights2, binning, los, box_size, regions1, regions2, \
n_regions, raw, progress, progress_path
        As in :func:`corrpipe.paircount.count_pairs`: positions (N, 3) in Mpc/h, box_size in
        Mpc/h, binning in Mpc/h; ``progress_path`` is the HDF5 progress sidecar.
    client : distributed.Client, optional
        An open client from :func:`open_engine` (so DD, DR and RR share one cluster). With
        ``kind="dask"`` and no client, an engine is opened for this call and closed after it.
    n_threads : int, optional
        numba threads of the threads engine (default: all); ignored by the Dask engine, whose
        tasks use ``threads_per_worker``.
    on_partial : callable, optional
        Dask engine only (``count_pairs`` has no such hook): called on the client with each
        :class:`PartialCounts` after it has been saved to the sidecar (e.g. for logging); an
        exception it raises aborts the count, keeping what was saved.

    Returns
    -------
    PairCounts

    Raises
    ------
    InputError
        Invalid positions, weights, labels or geometry (raised before any task is sent).
    ConfigError
        The Dask engine cannot be opened.
    StageError
        A task failed for good (e.g. workers kept dying); finished units stay in the sidecar.

    Notes
    -----
    The Dask engine scatters the prepared count to all workers once (``broadcast=True``),
    submits one task per block of ``units_per_task`` units, saves each partial as it completes
    (``distributed.as_completed``) and reduces in unit order with ``reduce_partials``; a task
    lost with its worker is rerun by the Dask scheduler.
    """
    count_args = dict(binning=binning, los=los, box_size=box_size, regions1=regions1,
                      regions2=regions2, n_regions=n_regions, raw=raw)
    if settings.work_units > 0:
        count_args["n_units"] = settings.work_units
    if settings.kind == "threads":
        threads = numba.config.NUMBA_NUM_THREADS if n_threads is None else int(n_threads)
        return count_pairs(positions1, weights1, positions2, weights2, **count_args,
                           n_threads=n_threads, progress=progress, progress_path=progress_path,
                           units_per_batch=settings.batch_size(threads))
    prepared = prepare_count(positions1, weights1, positions2, weights2, **count_args)
    if client is None:
        with open_engine(settings) as own_client:
            return _count_on_dask(own_client, settings, prepared, progress, progress_path,
                                  on_partial)
    return _count_on_dask(client, settings, prepared, progress, progress_path, on_partial)


def _dask_batch_size(client, settings: EngineSettings, n_units: int) -> int:
    """Units per task: the configured value, else about four tasks per worker thread.

    Few, larger tasks keep the per-task cost of scheduling and result transfer small against
    the counting (measured on 2 workers: 48 tasks cost ~25 % over the threads engine, 8 tasks
    ~5 %), while four per thread still balance the load.
    """
    if settings.units_per_task > 0:
        return int(settings.units_per_task)
    try:
        total = sum(int(v) for v in client.nthreads().values())
    except Exception:  # noqa: BLE001 - an unusual client: fall back to the per-thread rule
        total = 0
    if total <= 0:
        return settings.batch_size()
    return max(1, -(-int(n_units) // (4 * total)))


def _count_on_dask(client, settings: EngineSettings, prepared: PreparedCount, progress: bool,
                   progress_path, on_partial) -> PairCounts:
    from tqdm.auto import tqdm

    from corrpipe.paircount.progress import ProgressSidecar

    sidecar = ProgressSidecar(progress_path, prepared) if progress_path is not None else None
    partials = sidecar.load() if sidecar is not None else []
    size = min(_dask_batch_size(client, settings, prepared.n_units), _memory_cap(prepared))
    n_done = sum(int(p.unit_ids.size) for p in partials)
    bar = tqdm(total=prepared.n_units, initial=n_done, unit="unit", disable=not show_bars(progress),
               desc=f"pairs {'auto' if prepared.auto else 'cross'} (dask)", leave=False)
    run = _DaskRun(client, settings, prepared, sidecar, partials, bar, on_partial)
    try:
        for attempt in range(_SCATTER_ATTEMPTS):
            done = [int(u) for p in partials for u in p.unit_ids]
            batches = task_batches(prepared.n_units, size, done)
            if not batches:
                break
            try:
                run.submit_and_collect(batches)
                break
            except _ScatteredDataLost as lost:
                if attempt == _SCATTER_ATTEMPTS - 1:
                    raise run.failure(lost.__cause__, "the catalogue scattered to the workers "
                                      f"was lost {_SCATTER_ATTEMPTS} times") from lost.__cause__
                _log.warning("every worker holding the scattered catalogue was lost; "
                             "scattering it again and resubmitting the missing units")
                _wait_for_workers(client, settings, None)
    finally:
        bar.close()
    return reduce_partials(prepared, partials)


_SCATTER_ATTEMPTS = 3


class _ScatteredDataLost(Exception):
    """Internal: the scattered PreparedCount is gone from the cluster (all holders died)."""


class _DaskRun:
    """One Dask pair count: scatter, submit, save partials as they arrive."""

    def __init__(self, client, settings, prepared, sidecar, partials, bar, on_partial):
        self.client, self.settings, self.prepared = client, settings, prepared
        self.sidecar, self.partials, self.bar, self.on_partial = sidecar, partials, bar, on_partial
        self.tag = prepared.fingerprint()[:12]
        self.started = time.perf_counter()
        self.pairs_here = 0

    def submit_and_collect(self, batches: list) -> None:
        import distributed

        client = self.client
        data = client.scatter(self.prepared, broadcast=True, hash=False)
        stamp = time.time_ns()
        pending = {}
        for batch in batches:
            future = client.submit(_count_task, data, batch, self.settings.threads_per_worker,
                                   key=f"corrpipe-count-{self.tag}-{batch[0]:06d}-{stamp}",
                                   pure=False)
            pending[future.key] = future
        try:
            for future in distributed.as_completed(list(pending.values()), loop=client.loop):
                try:
                    part = future.result()
                except CorrpipeError:
                    raise
                except Exception as exc:  # worker deaths, lost data, ...
                    if data.status != "finished":
                        raise _ScatteredDataLost() from exc
                    raise self.failure(exc, "a task failed for good") from exc
                # forget the result on the cluster: a later worker loss must not recompute it
                pending.pop(future.key).release()
                del future
                self._record(part)
        finally:
            if pending:
                client.cancel(list(pending.values()))
            client.cancel([data])

    def _record(self, part: PartialCounts) -> None:
        if self.sidecar is not None:
            self.sidecar.save(part)
        self.partials.append(part)
        self.pairs_here += part.n_pairs
        self.bar.update(int(part.unit_ids.size))
        elapsed = max(time.perf_counter() - self.started, 1e-9)
        self.bar.set_postfix_str(f"{self.pairs_here / elapsed:.3g} pairs/s", refresh=False)
        if self.on_partial is not None:
            self.on_partial(part)

    def failure(self, exc, what: str) -> StageError:
        n_saved = len(self.partials)
        if self.sidecar is not None:
            where = (f"the {n_saved} finished batches are saved in {self.sidecar.path}; run "
                     "again to count only the missing units")
        else:
            where = "give a progress_path to keep finished units across such failures"
        return StageError(f"Dask pair count: {what} ({type(exc).__name__}: {exc}); {where}. "
                          "Check the workers' logs (memory limit, killed processes)")


# ---------------------------------------------------------------------------- mock batches
def map_on_engine(settings: EngineSettings, fn: Callable[[Any], Any], items: Sequence[Any], *,
                  client=None, progress: bool = False, desc: str = "mocks") -> list:
    """Apply ``fn`` to every item (one task per item on Dask) and return results in input order.

    Parameters
    ----------
    settings : EngineSettings
    fn : callable
        ``fn(item) -> result``; for Dask it must be picklable and importable on the workers
        (a module-level function or a ``functools.partial`` of one).
    items : sequence
        E.g. paths of mock catalogues or seeds.
    client : distributed.Client, optional
        An open client from :func:`open_engine`; opened for this call if missing.
    progress : bool
        Show a progress bar.
    desc : str
        Label of the progress bar.

    Returns
    -------
    list
        ``[fn(item) for item in items]``.

    Raises
    ------
    StageError
        ``fn`` failed on an item (the message names the item; the original error is chained).
    """
    from tqdm.auto import tqdm

    items = list(items)
    bar = tqdm(total=len(items), unit="item", disable=not show_bars(progress), desc=desc,
               leave=False)
    try:
        if settings.kind == "threads":
            results = []
            for index, item in enumerate(items):
                try:
                    results.append(fn(item))
                except Exception as exc:
                    raise _item_error(index, item, exc) from exc
                bar.update(1)
            return results
        if client is None:
            with open_engine(settings) as own_client:
                return _map_on_dask(own_client, settings, fn, items, bar)
        return _map_on_dask(client, settings, fn, items, bar)
    finally:
        bar.close()


def _map_on_dask(client, settings: EngineSettings, fn, items: list, bar) -> list:
    import distributed

    if not items:
        return []
    stamp = time.time_ns()
    futures = [client.submit(_item_task, fn, item, settings.threads_per_worker, pure=False,
                             key=f"corrpipe-item-{index:06d}-{stamp}")
               for index, item in enumerate(items)]
    index_of = {f.key: i for i, f in enumerate(futures)}
    results: list = [None] * len(items)
    try:
        for future in distributed.as_completed(futures, loop=client.loop):
            index = index_of[future.key]
            try:
                results[index] = future.result()
            except Exception as exc:
                raise _item_error(index, items[index], exc) from exc
            bar.update(1)
    finally:
        unfinished = [f for f in futures if not f.done()]
        if unfinished:
            client.cancel(unfinished)
    return results


def _item_error(index: int, item: Any, exc: Exception) -> StageError:
    text = repr(item) if not isinstance(item, np.ndarray) else f"array of shape {item.shape}"
    if len(text) > 80:
        text = text[:77] + "..."
    return StageError(f"mock batch item {index} ({text}) failed: {type(exc).__name__}: {exc}")
