"""Recovery of a known expansion history by the full MCMC (slower than the tests).

Draws N data sets around a known model with the correlations and errors (times --scale) of a
measurement file (default: the DESI 2024 table from memory used by the tests), fits each with
the emcee chain of the cosmology stage and, side by side, with the best fit + Fisher errors
(Laplace), and prints per parameter the mean pull (median - truth) / sigma_68, its standard
error, and the 68 % coverage. Common practice for validating an inference; the test suite
checks the Laplace version with 400 data sets.

Usage: PYTHONPATH=. python scripts/validate_cosmology.py [--model w0wacdm] [--n 30]
       [--scale 1.0] [--file FILE] [--seed 1]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from corrpipe.cosmo import (DataVector, DistanceLikelihood, ExpansionModel,  # noqa: E402
                            ParameterSpace, laplace, read_external, sample_posterior)

TABLE = (Path(__file__).resolve().parents[1] / "tests" / "validation" / "data"
         / "desi2024_bao_table1_memory.ecsv")
TRUTH = {"flat-lcdm": [0.31, 100.0], "wcdm": [0.31, 100.0, -0.9],
         "w0wacdm": [0.31, 100.0, -0.8, -0.5]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", default="w0wacdm", choices=tuple(TRUTH))
    parser.add_argument("--n", type=int, default=30)
    parser.add_argument("--scale", type=float, default=1.0, help="multiplies the errors")
    parser.add_argument("--file", type=Path, default=TABLE)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    d = read_external(args.file)
    cov = d.covariance * args.scale**2
    space = ParameterSpace(ExpansionModel(args.model))
    like = DistanceLikelihood(space, DataVector(d.measurements, cov, d.origin))
    truth = np.array(TRUTH[args.model])
    mean = like.predict(truth)
    chol = np.linalg.cholesky(cov)
    rng = np.random.default_rng(args.seed)
    mc, lp, n_conv = [], [], 0
    t0 = time.perf_counter()
    for i in range(args.n):
        draw = like.with_values(mean + chol @ rng.standard_normal(mean.size))
        res = sample_posterior(draw, seed=args.seed + i, progress=False)
        n_conv += res.converged
        med = np.array([res.constraints[n]["median"] for n in space.names])
        sig = np.array([0.5 * np.diff(res.constraints[n]["interval_68"])[0]
                        for n in space.names])
        lo = np.array([res.constraints[n]["interval_68"][0] for n in space.names])
        hi = np.array([res.constraints[n]["interval_68"][1] for n in space.names])
        mc.append(((med - truth) / sig, (lo <= truth) & (truth <= hi)))
        q = laplace(draw, start=truth)
        lp.append(((q["best_fit"] - truth) / q["errors"],
                   np.abs(q["best_fit"] - truth) < q["errors"]))
        print(f"  data set {i + 1}/{args.n}: {time.perf_counter() - t0:.0f} s", flush=True)
    print(f"{args.model}, errors x {args.scale:g} of {args.file.name}, {args.n} data sets, "
          f"{n_conv} chains converged")
    print(f"{'parameter':10s} {'truth':>8s} | {'MCMC pull':>10s} {'+-':>5s} {'cov68':>6s} | "
          f"{'Laplace pull':>12s} {'+-':>5s} {'cov68':>6s}")
    for k, name in enumerate(space.names):
        pm = np.array([p[0][k] for p in mc])
        cm = np.mean([p[1][k] for p in mc])
        pl = np.array([p[0][k] for p in lp])
        cl = np.mean([p[1][k] for p in lp])
        se = 1.0 / np.sqrt(args.n)
        print(f"{name:10s} {truth[k]:8.3f} | {pm.mean():+10.3f} {se:5.2f} {cm:6.2f} | "
              f"{pl.mean():+12.3f} {se:5.2f} {cl:6.2f}")


if __name__ == "__main__":
    main()
