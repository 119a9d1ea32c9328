#!/usr/bin/env python
"""Benchmark of field footprints: building 1e5 fields, drawing 2e7 randoms, memory.

Everything is measured in one run and printed side by side (machines are noisy):

1. Build: reading nothing, constructing a :class:`FieldFootprint` of ``--fields`` fields
   (squares, rectangles and circles of about an arcminute, scattered over a few hundred square
   degrees so some overlap), its sky grid and the areas of the overlapping fields.
2. Randoms: ``make_local_randoms`` with one tabulated dN/dz per field (the worst case: every
   field its own depth class), for several catalogue sizes up to ``--randoms``, against the
   floor of drawing the same number of randoms in one RA/Dec box with the global shuffle
   (``make_randoms``); ratio = field time / box time.
3. Containment: ``contains`` on 1e7 isotropic directions.
4. Memory: in a child process per size, the resident-memory peak (Linux VmHWM, reset just
   before) while drawing the catalogue, above the resident memory just before, against the
   catalogue's own size (ra, dec, z, weights, subset: 40 bytes per random).

Targets (issue 15): 1e5 fields and 2e7 randoms in <= 60 s on 2 cores; memory <= 2x the
catalogue.

Usage::

    PYTHONPATH=. python scripts/bench_fields.py                      # 1e5 fields, 2e7 randoms
    PYTHONPATH=. python scripts/bench_fields.py --fields 2e4 --randoms 2e6
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import time

import numpy as np


def make_fields(n: int, seed: int = 1):
    """An invented pattern of ``n`` pointings over ~300 deg^2 (RA 350..10, Dec -5..10)."""
    from corrpipe.survey.fields import CIRCLE, RECTANGLE, FieldFootprint

    rng = np.random.default_rng(seed)
    ra = (350.0 + 20.0 * rng.random(n)) % 360.0
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-5)), np.sin(np.radians(10)), n)))
    shape = np.where(rng.random(n) < 0.5, CIRCLE, RECTANGLE)
    side = rng.uniform(0.8, 1.2, n) / 60
    return FieldFootprint(ra, dec, shape, side, side * rng.uniform(0.7, 1.0, n),
                          rng.uniform(0, 180, n), side / 2, rng.uniform(0.5, 1.0, n),
                          np.arange(n), overlap_samples=4000)


def per_field_table(n_fields: int, n_bins: int = 40, seed: int = 2):
    """One Gaussian dN/dz per field with a field-dependent mean (invented)."""
    from corrpipe.survey.selection import TabulatedSelection

    rng = np.random.default_rng(seed)
    edges = np.linspace(0.9, 1.8, n_bins + 1)
    centres = 0.5 * (edges[1:] + edges[:-1])
    mean = rng.uniform(1.1, 1.6, n_fields)[:, None]
    return TabulatedSelection(edges, np.exp(-0.5 * ((centres[None, :] - mean) / 0.15) ** 2))


def _rss_bytes() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * resource.getpagesize()


def _reset_peak() -> None:
    """Reset the kernel's resident-memory high-water mark (Linux: clear_refs 5)."""
    with open("/proc/self/clear_refs", "w") as f:
        f.write("5")


def _peak_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def child(n_fields: int, n_randoms: int) -> None:
    """Draw one catalogue and print JSON with its time, size and memory peak."""
    from corrpipe.survey.randoms import make_local_randoms

    fp = make_fields(n_fields)
    fp.area_sr()
    table = per_field_table(n_fields)
    make_local_randoms(fp, table, 10_000, seed=0, progress=False)     # compile / warm up
    _reset_peak()
    before = _rss_bytes()
    t0 = time.perf_counter()
    cat, fields = make_local_randoms(fp, table, n_randoms, seed=1, progress=False)
    dt = time.perf_counter() - t0
    peak = _peak_bytes()
    size = sum(getattr(cat, k).nbytes for k in ("ra", "dec", "z", "weights", "subset"))
    print(json.dumps(dict(seconds=dt, catalogue_bytes=size, extra_peak=peak - before,
                          field_bytes=int(fields.nbytes))))


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--fields", type=float, default=1e5)
    p.add_argument("--randoms", type=float, default=2e7)
    p.add_argument("--child", nargs=2, type=float, help=argparse.SUPPRESS)
    args = p.parse_args()
    if args.child:
        child(int(args.child[0]), int(args.child[1]))
        return 0
    n_fields, n_max = int(args.fields), int(args.randoms)

    from corrpipe.survey.footprint import BoxFootprint, SkyBox
    from corrpipe.survey.randoms import make_randoms

    make_fields(1000).area_sr()                                         # compile
    t0 = time.perf_counter()
    fp = make_fields(n_fields)
    area = fp.area_sr()
    t_build = time.perf_counter() - t0
    print(f"build: {n_fields} fields ({int(fp._touched.sum())} touched by an earlier one), "
          f"{t_build:.2f} s; area {area * (180 / np.pi) ** 2:.3f} deg^2 "
          f"(+- {fp.area_error_sr() * (180 / np.pi) ** 2:.4f}), sum of single fields "
          f"{fp.field_areas_sr().sum() * (180 / np.pi) ** 2:.3f} deg^2")

    rng = np.random.default_rng(3)
    v = rng.standard_normal((10_000_000, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    ra, dec = np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360, np.degrees(np.arcsin(v[:, 2]))
    del v
    t0 = time.perf_counter()
    inside = fp.contains(ra, dec)
    t_contains = time.perf_counter() - t0
    print(f"contains: 1e7 directions in {t_contains:.2f} s ({inside.mean() * 4 * np.pi:.5f} sr "
          f"inside by count vs {area:.5f} sr)")
    del ra, dec, inside

    box = BoxFootprint((SkyBox(350, 10, -5, 10),))
    data_z = np.random.default_rng(4).uniform(0.9, 1.8, 100_000)
    sizes = sorted({n for n in (n_max // 20, n_max // 4, n_max) if n > 0})
    print(f"\n{'randoms':>10} {'fields s':>9} {'box s':>7} {'ratio':>6} "
          f"{'catalogue MB':>13} {'extra peak MB':>14} {'peak/cat':>9}")
    for n in sizes:
        out = subprocess.run([sys.executable, __file__, "--child", str(n_fields), str(n)],
                             capture_output=True, text=True, check=True)
        res = json.loads(out.stdout.strip().splitlines()[-1])
        t0 = time.perf_counter()
        make_randoms(box, data_z, n_randoms=n, seed=5, progress=False)
        t_box = time.perf_counter() - t0
        print(f"{n:>10d} {res['seconds']:>9.2f} {t_box:>7.2f} {res['seconds'] / t_box:>6.2f} "
              f"{res['catalogue_bytes'] / 1e6:>13.0f} {res['extra_peak'] / 1e6:>14.0f} "
              f"{res['extra_peak'] / res['catalogue_bytes']:>9.2f}")
    print("\nextra peak includes the int64 field index returned with the catalogue "
          "(8 bytes per random, 0.2x the catalogue)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
