#!/usr/bin/env python
"""Benchmark of the mesh hot paths, printed side by side in one run (machines are noisy).

1. Painting: the numba CIC/TSC kernels against a plain-numpy reference (np.add.at over the
   8 / 27 neighbour cells), same points, same mesh; ratio = numpy time / numba time.
2. Read-out: numba CIC interpolation against numpy fancy indexing of the 8 neighbours.
3. FFT: scipy.fft.rfftn float32 vs float64 on the same mesh, and workers=1 vs all cores.
4. Memory: the input field plus the peak of numpy allocations (tracemalloc) while computing
   a Zel'dovich displacement (3 x n^3 real fields out) at ``--mesh`` in float32 and float64,
   in child processes, with the extrapolation to 512^3 (the reconstruction target: must fit
   in 24 GiB).

Usage::

    python scripts/bench_mesh.py               # 2e6 points, 256^3 mesh
    python scripts/bench_mesh.py --points 1e7 --mesh 512
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import time

import numpy as np

from corrpipe import mesh


def _timed(fun, repeat=3):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fun()
        best = min(best, time.perf_counter() - t0)
    return best, out


def numpy_paint(pos, box, n, order):
    u = (pos / (box / n)) % n
    out = np.zeros((n, n, n))
    if order == 2:
        i0 = np.floor(u).astype(np.int64)
        d = u - i0
        for a in (0, 1):
            for b in (0, 1):
                for c in (0, 1):
                    w = ((d[:, 0] if a else 1 - d[:, 0]) * (d[:, 1] if b else 1 - d[:, 1])
                         * (d[:, 2] if c else 1 - d[:, 2]))
                    np.add.at(out, ((i0[:, 0] + a) % n, (i0[:, 1] + b) % n,
                                    (i0[:, 2] + c) % n), w)
        return out
    i0 = np.floor(u + 0.5).astype(np.int64)
    d = u - i0
    wts = [0.5 * (0.5 - d) ** 2, 0.75 - d**2, 0.5 * (0.5 + d) ** 2]
    for a in range(3):
        for b in range(3):
            for c in range(3):
                w = wts[a][:, 0] * wts[b][:, 1] * wts[c][:, 2]
                np.add.at(out, ((i0[:, 0] + a - 1) % n, (i0[:, 1] + b - 1) % n,
                                (i0[:, 2] + c - 1) % n), w)
    return out


def numpy_read_cic(field, pos, box):
    n = field.shape[0]
    u = (pos / (box / n)) % n
    i0 = np.floor(u).astype(np.int64)
    d = u - i0
    out = np.zeros(pos.shape[0])
    for a in (0, 1):
        for b in (0, 1):
            for c in (0, 1):
                w = ((d[:, 0] if a else 1 - d[:, 0]) * (d[:, 1] if b else 1 - d[:, 1])
                     * (d[:, 2] if c else 1 - d[:, 2]))
                out += w * field[(i0[:, 0] + a) % n, (i0[:, 1] + b) % n, (i0[:, 2] + c) % n]
    return out


_CHILD = """
import sys, tracemalloc, numpy as np
from corrpipe import mesh
n, dt = int(sys.argv[1]), {"32": np.float32, "64": np.float64}[sys.argv[2]]
delta = np.random.default_rng(0).standard_normal((n, n, n), dtype=dt)
tracemalloc.start()
psi = mesh.displacement(delta, 1000.0)
current, peak = tracemalloc.get_traced_memory()
print(delta.nbytes / 2**30, peak / 2**30, psi.dtype)
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="mesh benchmarks")
    ap.add_argument("--points", type=float, default=2e6)
    ap.add_argument("--mesh", type=int, default=256)
    args = ap.parse_args(argv)
    n_pts, n = int(args.points), args.mesh
    box = 1000.0
    rng = np.random.default_rng(1)
    pos = rng.uniform(0, box, size=(n_pts, 3))
    mesh.paint(pos[:10], box, n)  # compile outside the timing
    mesh.interpolate(np.zeros((4, 4, 4)), pos[:10], 100.0)
    print(f"{n_pts:.2g} points, {n}^3 mesh, {os.cpu_count()} cores")
    for scheme, order in (("cic", 2), ("tsc", 3)):
        t_nb, m_nb = _timed(lambda: mesh.paint(pos, box, n, scheme=scheme))
        t_np, m_np = _timed(lambda: numpy_paint(pos, box, n, order), repeat=1)
        err = np.max(np.abs(m_nb - m_np))
        print(f"paint {scheme}: numba {t_nb:.3f} s, numpy {t_np:.3f} s, ratio {t_np / t_nb:.1f}x"
              f" (max |diff| {err:.1e})")
    field = rng.standard_normal((n, n, n))
    t_nb, r_nb = _timed(lambda: mesh.interpolate(field, pos, box, "cic"))
    t_np, r_np = _timed(lambda: numpy_read_cic(field, pos, box), repeat=1)
    print(f"read cic: numba {t_nb:.3f} s, numpy {t_np:.3f} s, ratio {t_np / t_nb:.1f}x "
          f"(max |diff| {np.max(np.abs(r_nb - r_np)):.1e})")
    f64 = field
    f32 = field.astype(np.float32)
    t64, _ = _timed(lambda: mesh.to_fourier(f64))
    t32, _ = _timed(lambda: mesh.to_fourier(f32))
    t1, _ = _timed(lambda: mesh.to_fourier(f64, workers=1))
    print(f"rfftn {n}^3: float64 {t64:.3f} s, float32 {t32:.3f} s (ratio {t64 / t32:.2f}x); "
          f"workers=1 {t1:.3f} s vs all {t64:.3f} s (ratio {t1 / t64:.2f}x)")
    for bits in ("32", "64"):
        res = subprocess.run([sys.executable, "-c", _CHILD, str(n), bits], capture_output=True,
                             text=True, check=True)
        field_gib, peak, _ = res.stdout.split()
        used = float(field_gib) + float(peak)
        scale = (512 / n) ** 3
        print(f"displacement {n}^3 float{bits}: input {float(field_gib):.3f} GiB + peak of "
              f"new arrays {float(peak):.3f} GiB = {used:.3f} GiB; extrapolated to 512^3: "
              f"{used * scale:.1f} GiB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
