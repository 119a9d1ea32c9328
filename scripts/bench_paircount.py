"""Benchmark of the pair counter against a general-purpose reference and a naive floor loop.

Measured in one run on the same points (uniform in a cube of side 1000 Mpc/h, N = 2e5,
weights uniform in [0.5, 1.5], s_max = 150 Mpc/h, 30 s bins, 100 mu bins):

1. corrpipe (s, mu) weighted auto-count (non-periodic, midpoint line of sight), end to end
   (validation, cell sorting, planning and counting);
2. scipy.spatial.cKDTree.count_neighbors with weights on the same s edges (timed on a
   subsample and scaled by the number of pairs when the full set would take too long);
3. a floor loop: the simplest numba cell list (cells of side s_max, 27 neighbour cells,
   each pair once, float64, parallel=True, fastmath=True) that only counts d^2 < s_max^2,
   without binning or weights (cell sorting not timed).

It then prints the time scaling with N at fixed density and the peak memory of a count.
Usage: ``python scripts/bench_paircount.py [--quick]``. Not part of the test suite.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

import numba
import numpy as np
from numba import njit, prange
from scipy.spatial import cKDTree

from corrpipe.paircount import Binning, count_pairs

BOX = 1000.0
S_MAX = 150.0


@njit(cache=True, parallel=True, fastmath=True)
def _floor_count(x, y, z, start, n_side, s2):
    n_cells = n_side * n_side * n_side
    per_cell = np.zeros(n_cells, dtype=np.int64)
    for c in prange(n_cells):
        cx = c // (n_side * n_side)
        cy = (c // n_side) % n_side
        cz = c % n_side
        total = 0
        for ox in range(-1, 2):
            for oy in range(-1, 2):
                for oz in range(-1, 2):
                    jx, jy, jz = cx + ox, cy + oy, cz + oz
                    if jx < 0 or jy < 0 or jz < 0 or jx >= n_side or jy >= n_side or jz >= n_side:
                        continue
                    c2 = (jx * n_side + jy) * n_side + jz
                    if c2 < c:
                        continue
                    for i in range(start[c], start[c + 1]):
                        jlo = i + 1 if c2 == c else start[c2]
                        for j in range(jlo, start[c2 + 1]):
                            dx = x[j] - x[i]
                            dy = y[j] - y[i]
                            dz = z[j] - z[i]
                            if dx * dx + dy * dy + dz * dz < s2:
                                total += 1
        per_cell[c] = total
    return per_cell.sum()


def cpu_description() -> str:
    """CPU model and widest vector extension, from /proc/cpuinfo (Linux; else 'unknown')."""
    try:
        text = open("/proc/cpuinfo").read()
    except OSError:
        return "unknown"
    model = next((line.split(":", 1)[1].strip() for line in text.splitlines()
                  if line.startswith("model name")), "unknown")
    flags = next((set(line.split(":", 1)[1].split()) for line in text.splitlines()
                  if line.startswith("flags")), set())
    simd = next((f for f in ("avx512f", "avx2", "avx", "sse4_2") if f in flags), "none listed")
    return f"{model}, {simd}"


def floor_loop(pos: np.ndarray, box: float, s_max: float):
    """Sort into cells of side >= s_max (not timed), then time the naive loop."""
    n_side = max(1, int(box // s_max))
    cell = np.minimum((pos / (box / n_side)).astype(np.int64), n_side - 1)
    lin = (cell[:, 0] * n_side + cell[:, 1]) * n_side + cell[:, 2]
    order = np.argsort(lin, kind="stable")
    x, y, z = (np.ascontiguousarray(pos[order, a]) for a in range(3))
    start = np.searchsorted(lin[order], np.arange(n_side**3 + 1))
    t0 = time.perf_counter()
    n_pairs = _floor_count(x, y, z, start, n_side, s_max * s_max)
    return time.perf_counter() - t0, int(n_pairs)


def kdtree_count(pos, w, edges, budget_pairs: float):
    """cKDTree.count_neighbors with weights; subsample when the full count is too large."""
    n = pos.shape[0]
    expected = 0.5 * n * n * (4 / 3 * np.pi * edges[-1] ** 3) / BOX**3
    frac = min(1.0, np.sqrt(budget_pairs / expected))
    m = int(n * frac)
    sub, wsub = pos[:m], w[:m]
    t0 = time.perf_counter()
    tree = cKDTree(sub)
    cum = tree.count_neighbors(tree, edges, weights=(wsub, wsub), cumulative=True)
    elapsed = time.perf_counter() - t0
    raw_tree = cKDTree(sub)
    pairs = int((raw_tree.count_neighbors(raw_tree, edges[-1]) - m) // 2)
    weighted = 0.5 * np.diff(cum)  # ordered pairs -> distinct pairs (no zero-distance pairs)
    return elapsed, pairs, m, weighted


def _rss_child(n: int) -> None:
    """Run one count in this process and print peak memory figures as JSON."""
    rng = np.random.default_rng(7)
    side = (n / 2e5) ** (1 / 3) * BOX
    pos = rng.uniform(0, side, (n, 3))
    w = rng.uniform(0.5, 1.5, n)
    binning = Binning.linear(0.0, S_MAX, 30, n_mu=100)
    count_pairs(pos[:2000], w[:2000], binning=binning)  # compile / load kernels

    def rss(field):
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field):
                    return int(line.split()[1]) * 1024
        return 0

    with open("/proc/self/clear_refs", "w") as fh:
        fh.write("5")
    base = rss("VmRSS:")
    result = count_pairs(pos, w, binning=binning)
    peak = rss("VmHWM:")
    # histograms: the result plus the per-unit histograms of one batch (8 units by default)
    print(json.dumps({"n": n, "input_bytes": pos.nbytes + w.nbytes,
                      "hist_bytes": 9 * result.weighted.nbytes, "extra_peak_bytes": peak - base}))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes (smoke test)")
    parser.add_argument("--memory-child", type=int, default=0, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.memory_child:
        _rss_child(args.memory_child)
        return

    n = 50_000 if args.quick else 200_000
    rng = np.random.default_rng(42)
    pos = rng.uniform(0.0, BOX, (n, 3))
    w = rng.uniform(0.5, 1.5, n)
    binning = Binning.linear(0.0, S_MAX, 30, n_mu=100)
    threads = numba.config.NUMBA_NUM_THREADS
    print(f"machine: {os.cpu_count()} cores, numba threads {threads}; N = {n}, box {BOX:g} Mpc/h, "
          f"s_max {S_MAX:g} Mpc/h, 30 s bins x 100 mu bins")
    print(f"cpu: {cpu_description()} (the ratios depend on the host CPU's SIMD width)")
    print("load average (1, 5, 15 min) at start: " + ", ".join(f"{v:.2f}" for v in os.getloadavg()))

    # warm-up: compile or load every kernel before timing
    count_pairs(pos[:3000], w[:3000], binning=binning)
    floor_loop(pos[:3000], BOX, S_MAX)

    t0 = time.perf_counter()
    result = count_pairs(pos, w, binning=binning)
    t_ours = time.perf_counter() - t0
    pairs = result.meta["n_pairs"]
    rate_ours = pairs / t_ours

    t_floor, pairs_floor = floor_loop(pos, BOX, S_MAX)
    rate_floor = pairs_floor / t_floor

    t_tree, pairs_tree, m, weighted_tree = kdtree_count(pos, w, binning.edges[0], 3e7)
    rate_tree = pairs_tree / t_tree

    print()
    print(f"{'method':58s} {'time [s]':>10s} {'pairs':>13s} {'pairs/s':>11s}")
    print(f"{'1. corrpipe (s, mu) weighted auto-count, end to end':58s} {t_ours:10.2f} "
          f"{pairs:13d} {rate_ours:11.3g}")
    note = "" if m == n else f" (subsample N={m})"
    print(f"{'2. cKDTree.count_neighbors weighted' + note:58s} {t_tree:10.2f} {pairs_tree:13d} "
          f"{rate_tree:11.3g}")
    print(f"{'3. floor loop (27 cells, d2 < s_max2, no bins/weights)':58s} {t_floor:10.2f} "
          f"{pairs_floor:13d} {rate_floor:11.3g}")
    if m != n:
        print(f"   cKDTree full-N time estimated by pair-count scaling: "
              f"{t_tree * pairs / max(pairs_tree, 1):.1f} s")
    print(f"ratio corrpipe / cKDTree (pairs per second): {rate_ours / rate_tree:6.1f}x  (target >= 20)")
    print(f"ratio corrpipe / floor   (pairs per second): {rate_ours / rate_floor:6.2f}x  (target >= 1.0)")
    print(f"pair totals agree with the floor loop: {pairs == pairs_floor}")

    # check on the subsample that the two weighted isotropic counts agree
    sub = count_pairs(pos[:m], w[:m], binning=Binning.from_edges(binning.edges[0]))
    rel = np.max(np.abs(sub.weighted - weighted_tree) / np.maximum(weighted_tree, 1e-300))
    print(f"weighted s-counts vs cKDTree on the subsample: max relative difference {rel:.1e}")

    print()
    print("scaling with N at fixed density (2e-4 (h/Mpc)^3), s_max = 150 Mpc/h:")
    sizes = [10_000, 30_000, 100_000] if args.quick else [10_000, 30_000, 100_000, 300_000, 1_000_000]
    times, counts = [], []
    for size in sizes:
        side = (size / 2e5) ** (1 / 3) * BOX
        p = rng.uniform(0, side, (size, 3))
        ww = rng.uniform(0.5, 1.5, size)
        t0 = time.perf_counter()
        res = count_pairs(p, ww, binning=binning)
        dt = time.perf_counter() - t0
        times.append(dt)
        counts.append(res.meta["n_pairs"])
        print(f"  N = {size:9d}  box {side:7.1f} Mpc/h  time {dt:8.3f} s  pairs {res.meta['n_pairs']:12d}"
              f"  {res.meta['n_pairs'] / dt:9.3g} pairs/s")
    slope = np.polyfit(np.log(sizes), np.log(times), 1)[0]
    slope_big = np.polyfit(np.log(sizes[-3:]), np.log(times[-3:]), 1)[0]
    print(f"  exponent of time vs N: {slope:.2f} over all sizes, {slope_big:.2f} over the largest three"
          " (small boxes lose pairs at the edges)")

    print()
    n_mem = 200_000 if args.quick else 1_000_000
    out = subprocess.run([sys.executable, __file__, "--memory-child", str(n_mem)],
                         capture_output=True, text=True, check=True)
    mem = json.loads(out.stdout.strip().splitlines()[-1])
    mib = 2**20
    allowed = 2 * mem["input_bytes"] + mem["hist_bytes"]
    total_peak = mem["input_bytes"] + mem["extra_peak_bytes"]
    print(f"peak memory at N = {mem['n']}: inputs {mem['input_bytes'] / mib:.1f} MiB, extra during the "
          f"count {mem['extra_peak_bytes'] / mib:.1f} MiB, inputs + extra {total_peak / mib:.1f} MiB; "
          f"limit 2 x inputs + histograms = {allowed / mib:.1f} MiB -> "
          f"{'within' if total_peak <= allowed else 'OVER'} ({total_peak / allowed:.2f} of the limit)")
    print("load average (1, 5, 15 min) at end: " + ", ".join(f"{v:.2f}" for v in os.getloadavg()))


if __name__ == "__main__":
    main()
