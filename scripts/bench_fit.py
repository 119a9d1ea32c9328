"""Benchmark of the BAO fit: one anisotropic likelihood evaluation and a full fit.

Targets (issue 5): one evaluation (monopole + quadrupole, 20 s-bins each) <= 100 us; a full
anisotropic fit to convergence <= 60 s on a 2-core machine. Both figures, and their ratio to
the target, are measured in this one run and printed side by side.

Usage: python scripts/bench_fit.py [--repeats N]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np

from corrpipe.cosmology import Cosmology
from corrpipe.fit import FitSettings, build_likelihood, fit_multipoles
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate


def synthetic_data(lp: LinearPower):
    """Invented survey 'Lantern' at z = 0.6: 20 bins of 5 Mpc/h from 52.5 to 147.5 Mpc/h."""
    s = np.arange(52.5, 150.0, 5.0)
    tpl = BAOTemplate(lp)
    m = tpl.multipoles(s, 1.02, 0.99, (0, 2), B=1.5, beta=0.35, sigma_par=10.0,
                       sigma_perp=6.0, sigma_s=4.0)
    err = np.concatenate([1e-4 * 100 / s, 2e-4 * 100 / s])
    corr = np.exp(-np.abs(s[:, None] - s[None, :]) / 8.0)
    cov = np.block([[corr, 0.2 * corr], [0.2 * corr, corr]]) * np.outer(err, err)
    rng = np.random.default_rng(7)
    d = m.ravel() + np.linalg.cholesky(cov) @ rng.standard_normal(2 * s.size)
    return s, d, cov


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=20000)
    args = parser.parse_args()
    cosmo = Cosmology()
    lp = LinearPower.eisenstein_hu(cosmo, 0.6)
    s, d, cov = synthetic_data(lp)
    like = build_likelihood(s, d, cov, (0, 2), cosmology=cosmo, z_eff=0.6, linear_power=lp)
    theta = like.start()
    like.log_posterior(theta)  # compile / warm caches
    t0 = time.perf_counter()
    for i in range(args.repeats):
        theta[0] = 1.0 + 1e-6 * (i % 7)
        like.log_posterior(theta)
    per_eval = (time.perf_counter() - t0) / args.repeats * 1e6

    t0 = time.perf_counter()
    free = build_likelihood(s, d, cov, (0, 2), cosmology=cosmo, z_eff=0.6, linear_power=lp,
                            settings=FitSettings(sigma_prior_width=2.0))
    tabulate = time.perf_counter() - t0
    theta_free = free.start()
    free.log_posterior(theta_free)
    t0 = time.perf_counter()
    for i in range(args.repeats):
        theta_free[0] = 1.0 + 1e-6 * (i % 7)
        free.log_posterior(theta_free)
    per_eval_free = (time.perf_counter() - t0) / args.repeats * 1e6

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        res = fit_multipoles(s, d, cov, (0, 2), cosmology=cosmo, z_eff=0.6,
                             settings=FitSettings(), progress=False, seed=1,
                             progress_path=Path(tmp) / "fit.progress.h5", linear_power=None)
        full = time.perf_counter() - t0
    conv = res.convergence
    print(f"{'measure':38s} {'value':>10s} {'target':>10s} {'value/target':>13s}")
    print(f"{'likelihood evaluation (2 x 20 bins)':38s} {per_eval:8.1f}us {100:8.0f}us "
          f"{per_eval / 100:13.2f}")
    print(f"{'full anisotropic fit (incl. profile)':38s} {full:9.1f}s {60:9.0f}s "
          f"{full / 60:13.2f}")
    print(f"{'evaluation, free damping (no target)':38s} {per_eval_free:8.1f}us {100:8.0f}us "
          f"{per_eval_free / 100:13.2f}")
    print(f"{'damping-grid tabulation (no target)':38s} {tabulate:9.1f}s")
    print(f"fit: {conv['n_steps']} steps x {conv['n_walkers']} walkers, converged = "
          f"{conv['converged']}, max tau = {max(conv['tau']):.1f}; "
          f"alpha_par = {res.summary['alpha_par']['median']:.4f}, "
          f"alpha_perp = {res.summary['alpha_perp']['median']:.4f}")


if __name__ == "__main__":
    main()
