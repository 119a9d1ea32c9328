"""Benchmark of the pair counts a large emission-line survey needs, scaled down, with the
extrapolation to full size.

Scenario (invented for this benchmark): the "Veyra Deep Line Survey", 10^6 galaxies and
2x10^7 randoms spread uniformly in comoving volume over a sector of 1576 deg^2 (RA span
0.70 rad, |Dec| < 0.35 rad) between comoving distances 2300 and 3200 Mpc/h; mean density
3.0e-4 (h/Mpc)^3 for the galaxies. 100 jackknife regions on a 10 x 10 grid of equal area in
(RA, sin Dec). Bins: (s, |mu|), 32 linear s bins to 160 Mpc/h x 100 mu bins, midpoint line of
sight, invented weights uniform in [0.8, 1.2]. The galaxies are unclustered (uniform), which
understates DD by the clustering excess; DD is a small part of the cost.

Counts, each in one process on the same points:

- DD with regions (auto-count of the galaxies);
- DR with regions, and the same DR without regions (their time ratio is the region cost);
  regions shrink with the scaled sector (more cells straddle them than at full size), so DR
  is also counted with the full-size region grid (regions of full-size extent, about
  100 / scale of them in the scaled sector), which is what a unit meets at full size;
- RR from split randoms (Keihänen et al. 2019, A&A 631, A73): M = 20 random sets of the data
  size, pairs only within each set, with regions.

Scaling: the sector's area (hence every catalogue size) is divided by ``--scale`` at fixed
density, so the per-pair work is the same as at full size. The number of pairs per object
depends on the geometry (pairs lost across the sector's edges), so the full-size pair count of
each count is extrapolated as ``pairs_scaled * (N1_full / N1_scaled) * (f_full / f_scaled)``
with ``f`` the mean fraction of a sphere of radius s_max around a point of the sector that lies
inside the sector (Monte Carlo, printed); full-size time = full-size pairs / measured pairs/s
(time linear in pairs at fixed density). On a shared machine the wall time depends on other
processes, so the CPU time of all threads is printed too; CPU time / threads is the wall time
the count would take with a core per thread and perfect scaling (an optimistic bound).

Peak memory: resident-set high-water mark from ``/proc/self/status`` (VmHWM, reset with
``/proc/self/clear_refs`` before each count; Linux only), minus the resident size before the
count, which already holds the inputs. It is compared with inputs + result histograms. Memory
freed by an earlier count stays in the process and is reused, so after the first count the
figure is a lower bound; ``--full-memory`` measures a full-size DR count in a fresh process.

Usage: ``python scripts/bench_survey_counts.py [--scale 20] [--repeats 2] [--quick] [--full-memory]``.
Not part of the test suite.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numba
import numpy as np

# measure the checkout this script lives in, not another installed copy of corrpipe
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from corrpipe.paircount import Binning, count_pairs, split_random_rr

CHI_MIN, CHI_MAX = 2300.0, 3200.0      # Mpc/h
RA_SPAN, SIN_DEC = 0.70, np.sin(0.35)  # full-size sector
N_DATA_FULL, N_RANDOM_FULL = 1_000_000, 20_000_000
N_SIDE_REGIONS = 10                    # 10 x 10 = 100 regions
S_MAX, N_S, N_MU = 160.0, 32, 100
N_SPLIT = 20                           # random sets for RR (N_random / N_data)


def sector(scale: float) -> tuple:
    """RA span (rad) and sin(Dec) half-range of the sector with 1/scale of the full area."""
    shrink = 1.0 / np.sqrt(scale)
    return RA_SPAN * shrink, SIN_DEC * shrink


def draw_points(n: int, scale: float, rng: np.random.Generator):
    """Points uniform in comoving volume in the sector; their region labels (int64) on a 10 x 10
    grid over the scaled sector, and on the full-size sector's grid (regions of full-size
    extent, of which the scaled sector holds about 100 / scale)."""
    ra_span, sin_dec = sector(scale)
    ra = rng.uniform(0.0, ra_span, n)
    sdec = rng.uniform(-sin_dec, sin_dec, n)
    chi = np.cbrt(rng.uniform(CHI_MIN**3, CHI_MAX**3, n))
    cdec = np.sqrt(1.0 - sdec * sdec)
    pos = np.column_stack([chi * cdec * np.cos(ra), chi * cdec * np.sin(ra), chi * sdec])
    i_ra = np.minimum((ra / ra_span * N_SIDE_REGIONS).astype(np.int64), N_SIDE_REGIONS - 1)
    i_dec = np.minimum(((sdec + sin_dec) / (2 * sin_dec) * N_SIDE_REGIONS).astype(np.int64),
                       N_SIDE_REGIONS - 1)
    f_ra = np.minimum((ra / RA_SPAN * N_SIDE_REGIONS).astype(np.int64), N_SIDE_REGIONS - 1)
    f_dec = np.minimum(((sdec + SIN_DEC) / (2 * SIN_DEC) * N_SIDE_REGIONS).astype(np.int64),
                       N_SIDE_REGIONS - 1)
    return (pos, rng.uniform(0.8, 1.2, n), i_ra * N_SIDE_REGIONS + i_dec,
            f_ra * N_SIDE_REGIONS + f_dec)


def inside_fraction(scale: float, rng: np.random.Generator, n_centres: int = 20000,
                    n_offsets: int = 64) -> float:
    """Mean fraction of a sphere of radius S_MAX around a sector point that is in the sector."""
    ra_span, sin_dec = sector(scale)
    centres = draw_points(n_centres, scale, rng)[0]
    u = rng.normal(size=(n_offsets, 3))
    u *= (S_MAX * np.cbrt(rng.uniform(0, 1, n_offsets)) / np.linalg.norm(u, axis=1))[:, None]
    p = centres[:, None, :] + u[None, :, :]
    chi = np.linalg.norm(p, axis=2)
    ra = np.arctan2(p[..., 1], p[..., 0])
    sdec = p[..., 2] / chi
    inside = (chi >= CHI_MIN) & (chi < CHI_MAX) & (ra >= 0) & (ra < ra_span) & (np.abs(sdec) < sin_dec)
    return float(inside.mean())


def _rss(field: str) -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field):
                return int(line.split()[1]) * 1024
    return 0


def measured(fn):
    """Run ``fn`` once; return (result, wall seconds, CPU seconds of all threads, extra peak
    resident bytes)."""
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        base = _rss("VmRSS:")
    except OSError:
        base = -1
    t0 = time.perf_counter()
    c0 = time.process_time()
    result = fn()
    cpu = time.process_time() - c0
    elapsed = time.perf_counter() - t0
    extra = _rss("VmHWM:") - base if base >= 0 else -1
    return result, elapsed, cpu, extra


def hist_bytes(result) -> int:
    total = result.weighted.nbytes
    for name in ("raw", "region_both", "region_one"):
        arr = getattr(result, name)
        total += 0 if arr is None else arr.nbytes
    return total


def full_memory() -> None:
    """Peak memory of a full-size DR count: preparation (validation, cell-sorted copies, plan)
    and one batch of work units, which is all a count holds at once (later batches reuse the
    same amount and are summed as they finish)."""
    from corrpipe.paircount import count_units, prepare_count

    rng = np.random.default_rng(5)
    d_pos, d_w, _, d_reg = draw_points(N_DATA_FULL, 1.0, rng)
    r_pos, r_w, _, r_reg = draw_points(N_RANDOM_FULL, 1.0, rng)
    binning = Binning.linear(0.0, S_MAX, N_S, n_mu=N_MU)
    inputs = sum(a.nbytes for a in (d_pos, d_w, d_reg, r_pos, r_w, r_reg))

    def prepare_and_one_batch():
        prepared = prepare_count(d_pos, d_w, r_pos, r_w, binning=binning, regions1=d_reg,
                                 regions2=r_reg, n_regions=N_SIDE_REGIONS**2)
        part = count_units(prepared, range(min(8, prepared.n_units)))
        return prepared, part

    (prepared, part), elapsed, _, extra = measured(prepare_and_one_batch)
    hist = 8 * prepared.n_flat_bins * (1 + 2 * prepared.n_regions)
    gib = 2**30
    peak = inputs + extra
    print(f"full-size DR, {N_DATA_FULL} x {N_RANDOM_FULL}, 100 regions: inputs {inputs / gib:.3f} GiB, "
          f"result histograms {hist / 2**20:.1f} MiB, extra peak (VmHWM) {extra / gib:.3f} GiB, "
          f"peak {peak / gib:.3f} GiB = {peak / (inputs + hist):.2f} x (inputs + histograms); "
          f"headroom on a 24 GiB machine {24 - peak / gib:.1f} GiB "
          f"(prepare + first batch took {elapsed:.0f} s; {part.n_pairs} pairs in it)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", type=float, default=20.0,
                        help="divide the survey area and every catalogue size by this")
    parser.add_argument("--repeats", type=int, default=2, help="repeats per count (min taken)")
    parser.add_argument("--quick", action="store_true", help="scale 200, one repeat (smoke test)")
    parser.add_argument("--full-memory", action="store_true",
                        help="only measure the peak memory of a full-size DR count with regions "
                             "(prepare plus one batch of units; about 2 GiB, no full count)")
    args = parser.parse_args()
    if args.full_memory:
        full_memory()
        return
    scale = 200.0 if args.quick else args.scale
    repeats = 1 if args.quick else max(1, args.repeats)
    rng = np.random.default_rng(2026)
    n_data = round(N_DATA_FULL / scale)
    n_random = round(N_RANDOM_FULL / scale)
    data = draw_points(n_data, scale, rng)
    randoms = draw_points(n_random, scale, rng)
    sets = [tuple(a[k::N_SPLIT] for a in randoms[:3]) for k in range(N_SPLIT)]
    binning = Binning.linear(0.0, S_MAX, N_S, n_mu=N_MU)
    n_reg = N_SIDE_REGIONS**2
    ra_span, sin_dec = sector(scale)
    import corrpipe

    print(f"corrpipe from {Path(corrpipe.__file__).parent}")
    print(f"machine: {os.cpu_count()} cores, numba threads {numba.config.NUMBA_NUM_THREADS}; "
          "load average at start: " + ", ".join(f"{v:.2f}" for v in os.getloadavg()))
    print(f"scale 1/{scale:g}: {n_data} galaxies, {n_random} randoms, {n_reg} regions; sector "
          f"RA span {np.degrees(ra_span):.2f} deg, |sin Dec| < {sin_dec:.4f}, "
          f"{CHI_MIN:g}-{CHI_MAX:g} Mpc/h; (s, |mu|) {N_S} x {N_MU} bins to {S_MAX:g} Mpc/h, midpoint")

    f_scaled = inside_fraction(scale, np.random.default_rng(1))
    f_full = inside_fraction(1.0, np.random.default_rng(1))
    print(f"fraction of an s_max sphere inside the sector: scaled {f_scaled:.4f}, full {f_full:.4f}"
          f" -> pairs per object grow by {f_full / f_scaled:.3f} at full size")

    d_pos, d_w, d_reg, d_big = data
    r_pos, r_w, r_reg, r_big = randoms
    counts = {
        "DD, regions": (lambda: count_pairs(d_pos, d_w, binning=binning, regions1=d_reg,
                                            n_regions=n_reg), n_data, N_DATA_FULL,
                        d_pos.nbytes + d_w.nbytes + d_reg.nbytes),
        "DR, no regions": (lambda: count_pairs(d_pos, d_w, r_pos, r_w, binning=binning),
                           n_data, N_DATA_FULL, d_pos.nbytes + d_w.nbytes + r_pos.nbytes + r_w.nbytes),
        "DR, regions": (lambda: count_pairs(d_pos, d_w, r_pos, r_w, binning=binning,
                                            regions1=d_reg, regions2=r_reg, n_regions=n_reg),
                        n_data, N_DATA_FULL,
                        sum(a.nbytes for a in (d_pos, d_w, d_reg, r_pos, r_w, r_reg))),
        "DR, full-size regions": (lambda: count_pairs(d_pos, d_w, r_pos, r_w, binning=binning,
                                                      regions1=d_big, regions2=r_big,
                                                      n_regions=n_reg),
                                  n_data, N_DATA_FULL,
                                  sum(a.nbytes for a in (d_pos, d_w, d_big, r_pos, r_w, r_big))),
        f"RR split ({N_SPLIT} sets), regions": (
            lambda: split_random_rr(sets, binning=binning, n_regions=n_reg),
            n_random, N_RANDOM_FULL, sum(a.nbytes for s in sets for a in s)),
    }
    # warm-up: compile or load every kernel before timing
    small = 2000
    count_pairs(d_pos[:small], d_w[:small], r_pos[:small], r_w[:small], binning=binning,
                regions1=d_reg[:small], regions2=r_reg[:small], n_regions=n_reg)
    count_pairs(d_pos[:small], d_w[:small], r_pos[:small], r_w[:small], binning=binning)

    rows = {}
    for name, (fn, n_scaled, n_full, input_bytes) in counts.items():
        best, best_cpu, peak = np.inf, np.inf, 0
        for _ in range(repeats):
            result, elapsed, cpu, extra = measured(fn)
            best = min(best, elapsed)
            best_cpu = min(best_cpu, cpu)
            peak = max(peak, extra)
        rows[name] = (result, best, best_cpu, peak, n_scaled, n_full, input_bytes)
        if name == "DR, no regions":
            reference = result.weighted
        if name == "DR, regions":
            same = np.array_equal(result.weighted, reference)
        if name == "DR, full-size regions":
            same = same and np.array_equal(result.weighted, reference)

    mib = 2**20
    threads = numba.config.NUMBA_NUM_THREADS
    print()
    print(f"{'count':28s} {'wall [s]':>8s} {'cpu [s]':>8s} {'pairs':>11s} {'pairs/s':>9s} "
          f"{'pairs/cpu-s':>11s} {'peak extra':>10s} {'in+hist':>8s} {'peak/(in+hist)':>14s} "
          f"{'full pairs':>10s} {'full wall':>9s} {'full cpu/thr':>12s}")
    total_full = total_cpu = 0.0
    for name, (result, best, cpu, peak, n_scaled, n_full, input_bytes) in rows.items():
        pairs = result.meta["n_pairs"]
        growth = (n_full / n_scaled) * (f_full / f_scaled)
        full_pairs = pairs * growth
        full_time = best * growth
        full_cpu = cpu * growth / threads
        if name not in ("DR, no regions", "DR, full-size regions"):
            total_full += full_time
            total_cpu += full_cpu
        base = input_bytes + hist_bytes(result)
        ratio = (input_bytes + peak) / base if peak >= 0 else float("nan")
        print(f"{name:28s} {best:8.2f} {cpu:8.2f} {pairs:11.4g} {pairs / best:9.3g} "
              f"{pairs / cpu:11.3g} {peak / mib:8.1f}Mi {base / mib:6.1f}Mi {ratio:14.2f} "
              f"{full_pairs:10.3g} {full_time:9.0f} {full_cpu:12.0f}")
    t_reg, c_reg = rows["DR, regions"][1:3]
    t_plain, c_plain = rows["DR, no regions"][1:3]
    t_big, c_big = rows["DR, full-size regions"][1:3]
    print()
    print(f"region cost (DR with / without 100 regions, same points): wall {t_reg / t_plain:.2f}x, "
          f"cpu {c_reg / c_plain:.2f}x (target <= 1.2); weighted counts bitwise equal: {same}")
    present = len(np.unique(r_big))
    print(f"with regions of full-size extent ({present} of the 100 full-size regions fall in the "
          f"scaled sector, as a unit meets them at full size): wall {t_big / t_plain:.2f}x, "
          f"cpu {c_big / c_plain:.2f}x")
    print(f"extrapolated full-size DD + DR + RR with regions: {total_full:.0f} s = "
          f"{total_full / 60:.1f} min wall as measured; {total_cpu:.0f} s = {total_cpu / 60:.1f} min "
          f"if each of the {threads} threads had a core to itself (CPU time / threads; the "
          "contention of other processes inflates the wall time) (target <= 8 min)")
    n_in_full = N_RANDOM_FULL * (3 * 8 + 8 + 8) + N_DATA_FULL * (3 * 8 + 8 + 8)
    print("peak extra: memory beyond what the process held before the count (a lower bound "
          "after the first count; see --full-memory)")
    print(f"full-size DR inputs (float64 positions and weights, int64 labels): "
          f"{n_in_full / 2**30:.2f} GiB")
    print("load average at end: " + ", ".join(f"{v:.2f}" for v in os.getloadavg()))


if __name__ == "__main__":
    main()
