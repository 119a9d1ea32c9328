"""Benchmark of the line-interloper fit term: one likelihood evaluation with and without it.

Target (issue 17): the term adds at most 2x to one likelihood evaluation. Both timings are
measured in this one run, interleaved in rounds so that machine noise hits both alike, and
printed side by side with their ratio; the one-off cost of building the term (the
interloper template at its true redshift and its mapped multipoles) is printed too.

Usage: python scripts/bench_fit_interlopers.py [--repeats N] [--rounds R]
"""

from __future__ import annotations

import argparse
import dataclasses
import time

import numpy as np

from corrpipe.cosmology import Cosmology
from corrpipe.fit import FitSettings, build_likelihood
from corrpipe.theory.linear_power import LinearPower
from corrpipe.theory.template import BAOTemplate

Z = 1.2


def synthetic_data(lp: LinearPower):
    """Invented [O III] survey 'Ardent Shoal' at z = 1.2: 20 bins of 5 Mpc/h, 52.5-147.5."""
    s = np.arange(52.5, 150.0, 5.0)
    m = BAOTemplate(lp).multipoles(s, 1.01, 0.99, (0, 2), B=3.2, beta=0.45, sigma_par=8.0,
                                   sigma_perp=5.0, sigma_s=4.0)
    err = np.concatenate([1e-4 * 100 / s, 2e-4 * 100 / s])
    corr = np.exp(-np.abs(s[:, None] - s[None, :]) / 8.0)
    cov = np.block([[corr, 0.2 * corr], [0.2 * corr, corr]]) * np.outer(err, err)
    d = m.ravel() + np.linalg.cholesky(cov) @ np.random.default_rng(3).standard_normal(2 * s.size)
    return s, d, cov


def per_eval_us(like, theta, repeats: int) -> float:
    t0 = time.perf_counter()
    for i in range(repeats):
        theta[0] = 1.0 + 1e-6 * (i % 7)
        like.log_posterior(theta)
    return (time.perf_counter() - t0) / repeats * 1e6


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5000)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    cosmo = Cosmology()
    lp = LinearPower.eisenstein_hu(cosmo, Z)
    s, d, cov = synthetic_data(lp)
    plain_st = FitSettings(sigma_par=8.0, sigma_perp=5.0, beta=0.45)
    term_st = dataclasses.replace(plain_st, target_line="OIII5007", interloper_line="Ha",
                                  interloper_fraction=0.05, interloper_bias=1.3,
                                  interloper_bias_width=0.3)
    plain = build_likelihood(s, d, cov, (0, 2), cosmology=cosmo, z_eff=Z, linear_power=lp,
                             settings=plain_st)
    t0 = time.perf_counter()
    term = build_likelihood(s, d, cov, (0, 2), cosmology=cosmo, z_eff=Z, linear_power=lp,
                            settings=term_st)
    build_term = time.perf_counter() - t0
    t0 = time.perf_counter()
    build_likelihood(s, d, cov, (0, 2), cosmology=cosmo, z_eff=Z, linear_power=lp,
                     settings=plain_st)
    build_plain = time.perf_counter() - t0
    th_plain, th_term = plain.start(), term.start()
    plain.log_posterior(th_plain)
    term.log_posterior(th_term)
    a, b = [], []
    for _ in range(args.rounds):
        a.append(per_eval_us(plain, th_plain, args.repeats))
        b.append(per_eval_us(term, th_term, args.repeats))
    a, b = float(np.median(a)), float(np.median(b))
    print(f"one likelihood evaluation (monopole + quadrupole, {s.size} bins each; median of "
          f"{args.rounds} rounds x {args.repeats}):")
    print(f"  without interloper term : {a:8.1f} us")
    print(f"  with interloper term    : {b:8.1f} us   (parameters {', '.join(term.names)})")
    print(f"  ratio                   : {b / a:8.2f} x   (target <= 2)")
    print(f"building the likelihood: {build_plain:.3f} s without, {build_term:.3f} s with the "
          "term (interloper template + mapped multipoles, once)")


if __name__ == "__main__":
    main()
