"""Benchmark of the Dask engine: 1 vs 2 workers, and the overhead against the threads engine.

Measured in one run, interleaved, on the pair-counter benchmark catalogue: uniform points in a
cube of side 1000 Mpc/h, N = 2e5, weights uniform in [0.5, 1.5], s_max = 150 Mpc/h, 30 s bins,
100 mu bins, (s, mu) weighted auto-count (non-periodic, midpoint line of sight). Each timing is
end to end (validation, cell sorting, planning, scattering, counting, reduction):

1. threads engine, 2 numba threads (``count_pairs`` at its default batching);
2. Dask LocalCluster with 1 single-threaded worker process;
3. Dask LocalCluster with 2 single-threaded worker processes.

Both clusters are started once and kept; the kernels are loaded in every worker before timing.
Targets: 2 workers at least 1.8x the throughput of 1 worker; 2 workers within 15% of the
threads engine. The best of ``--repeat`` runs is compared (the machine is shared and noisy).
Usage: ``python scripts/bench_distributed.py [--quick] [--repeat R]``. Not part of the tests.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np

from corrpipe.distributed import EngineSettings, count_pairs_on, open_engine
from corrpipe.paircount import Binning

BOX = 1000.0
S_MAX = 150.0


def _catalogue(n: int):
    rng = np.random.default_rng(2026)
    side = (n / 2e5) ** (1 / 3) * BOX  # fixed density when --quick lowers N
    return rng.uniform(0.0, side, (n, 3)), rng.uniform(0.5, 1.5, n)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="N = 5e4 instead of 2e5")
    parser.add_argument("--repeat", type=int, default=3, help="timed runs per engine")
    args = parser.parse_args()

    n = 50_000 if args.quick else 200_000
    pos, w = _catalogue(n)
    binning = Binning.linear(0.0, S_MAX, 30, n_mu=100)
    threads = EngineSettings(kind="threads")
    one = EngineSettings(kind="dask", n_workers=1, threads_per_worker=1)
    two = EngineSettings(kind="dask", n_workers=2, threads_per_worker=1)

    t0 = time.perf_counter()
    with open_engine(one) as client1, open_engine(two) as client2:
        print(f"clusters started in {time.perf_counter() - t0:.1f} s")
        runs = {
            "threads engine, 2 threads": lambda: count_pairs_on(threads, pos, w, binning=binning,
                                                                n_threads=2),
            "dask, 1 worker x 1 thread": lambda: count_pairs_on(one, pos, w, binning=binning,
                                                                client=client1),
            "dask, 2 workers x 1 thread": lambda: count_pairs_on(two, pos, w, binning=binning,
                                                                 client=client2),
        }
        small = pos[:3000], w[:3000]
        count_pairs_on(threads, *small, binning=binning)
        count_pairs_on(one, *small, binning=binning, client=client1)
        for _ in range(3):  # reach both workers
            count_pairs_on(two, *small, binning=binning, client=client2)

        clients = {name: c for name, c in zip(runs, (None, client1, client2))}
        times = {name: [] for name in runs}
        cpu = {name: [] for name in runs}
        busiest = {name: [] for name in runs}
        results = {}
        for rep in range(args.repeat):
            for name, run in runs.items():
                own_start, workers_start = _cpu_seconds(clients[name])
                start = time.perf_counter()
                results[name] = run()
                times[name].append(time.perf_counter() - start)
                own_end, workers_end = _cpu_seconds(clients[name])
                used = [workers_end[k] - workers_start.get(k, 0.0) for k in workers_end]
                cpu[name].append(own_end - own_start + sum(used))
                busiest[name].append(max(used) if used else own_end - own_start)
            print(f"  run {rep + 1}: " + ", ".join(f"{t[-1]:.2f} s" for t in times.values()))

    n_pairs = next(iter(results.values())).meta["n_pairs"]
    ref = results["threads engine, 2 threads"].weighted
    print(f"\nN = {n}, {n_pairs:.4g} pairs within {S_MAX:g} Mpc/h, best of {args.repeat} runs")
    print(f"{'engine':30s} {'time (s)':>9s} {'median':>8s} {'Mpairs/s':>9s} {'CPU (s)':>8s}"
          f" {'max rel diff':>13s}")
    best = {}
    for name, t in times.items():
        best[name] = min(t)
        diff = np.max(np.abs(results[name].weighted - ref) / np.maximum(np.abs(ref), 1e-300))
        print(f"{name:30s} {best[name]:9.2f} {np.median(t):8.2f} {n_pairs / best[name] / 1e6:9.2f}"
              f" {min(cpu[name]):8.2f} {diff:13.2e}")
    speedup = best["dask, 1 worker x 1 thread"] / best["dask, 2 workers x 1 thread"]
    overhead = best["dask, 2 workers x 1 thread"] / best["threads engine, 2 threads"] - 1.0
    print(f"\n2 workers / 1 worker throughput: {speedup:.2f}x   (target >= 1.8x)")
    print(f"dask 2 workers vs threads engine: {100 * overhead:+.1f}% time   (target <= +15%)")
    cpu_overhead = min(cpu["dask, 2 workers x 1 thread"]) / min(cpu["threads engine, 2 threads"])
    cpu_speedup = (min(busiest["dask, 1 worker x 1 thread"])
                   / min(busiest["dask, 2 workers x 1 thread"]))
    print("\nCPU-time view (less sensitive to other load on the machine than wall time):")
    print(f"  CPU seconds, dask 2 workers (client + workers) / threads engine: {cpu_overhead:.2f}")
    print(f"  CPU of the 1 worker / CPU of the busier of 2 workers: {cpu_speedup:.2f}x "
          "(the 2-worker speed-up on idle cores)")
    print(f"load average during the run: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores "
          "(ratios mean little when it exceeds the core count)")


def _cpu_seconds(client) -> tuple[float, dict]:
    """CPU seconds used so far by this process, and by each worker of a Dask engine."""
    own = time.process_time()
    workers = client.run(time.process_time) if client is not None else {}
    return own, workers


if __name__ == "__main__":
    main()
