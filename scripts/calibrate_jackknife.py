#!/usr/bin/env python
"""Compare jackknife covariances with the scatter of the multipoles across a batch of mocks.

Reads the finished pipeline runs of a mock batch (for example the survey folders written by
``scripts/validate_mocks.py``: ``OUT/survey_*/results``), recomputes each mock's jackknife
covariance from its stored pair counts with every cross-pair weighting, and compares them,
on the fitted bins, with the sample covariance of the measured multipoles across the mocks
(the mocks are independent draws of the same survey, so their scatter is the truth the
jackknife tries to estimate). It prints, per weighting:

* the ratio of the mean jackknife variance to the mock variance, bin by bin summarised per
  multipole (median over bins);
* ``h tr(C_jk^-1 C_mock) / p`` averaged over mocks, with h the Hartlap et al. (2007) factor:
  about 1 for a calibrated jackknife, < 1 when the jackknife overestimates the errors (this is
  the quantity that sets the width of the fitted posteriors);
* the mean chi^2 of each mock's deviation from the batch mean under its own jackknife
  precision, against its expectation p (n - 1) / n;
* the variance of the BAO-weighted combinations of the multipoles (the linearised estimators
  of alpha_iso, alpha_par and alpha_perp: w = Q g / g^T Q g, g the template's derivative, Q
  the broadband-marginalised precision) under the jackknife against their scatter across the
  mocks: these are the directions that set the fitted errors.

With n mocks the mock variance of one bin is uncertain by sqrt(2 / (n - 1)) (about 30 % for
20 mocks); the summaries over bins are tighter. Example::

    python scripts/validate_mocks.py --n-box 0 --n-survey 20 --survey-scale demo --out runs
    python scripts/calibrate_jackknife.py runs/survey_*/demo.toml
"""

from __future__ import annotations

import argparse
import dataclasses
import sys

import h5py
import numpy as np

from corrpipe.config import load_config
from corrpipe.covariance import hartlap_factor, jackknife_from_counts
from corrpipe.errors import CorrpipeError
from corrpipe.fit.run import build_likelihood
from corrpipe.stages.counts import read_counts

WEIGHTINGS = ("standard", "mohammad_percival")


def fit_mask(s: np.ndarray, ells, fit) -> np.ndarray:
    """Boolean mask of the fitted bins in the stacked multipole vector."""
    in_range = (s >= fit.s_min) & (s <= fit.s_max)
    return np.concatenate([in_range & (ell in fit.fit_ells) for ell in ells])


def load_mock(config_path: str) -> dict:
    """Multipole vector and jackknife covariances (all weightings) of one finished run."""
    cfg = load_config(config_path)
    a = cfg.analyses[0]
    folder = cfg.analysis_folder(a)
    missing = [n for n in ("estimate.h5", "counts.h5") if not (folder / n).exists()]
    if missing:
        raise SystemExit(f"{config_path}: no {', '.join(missing)} in {folder}; run the "
                         "pipeline on this mock first (corrpipe run CONFIG --until estimate)")
    if a.covariance.kind != "jackknife":
        raise SystemExit(f"{config_path}: [covariance] kind = '{a.covariance.kind}'; the "
                         "counts of a jackknife run are needed")
    with h5py.File(folder / "estimate.h5", "r") as h5:
        s = h5["estimate/s"][()]
        ells = [int(e) for e in h5["estimate"].attrs["ells"]]
        vector = h5["estimate/multipoles"][()].ravel()
        z_eff = float(h5.attrs["z_eff"])
    with h5py.File(folder / "counts.h5", "r") as h5:
        counts = read_counts(h5, "smu")
    mask = fit_mask(s, ells, a.fit)
    fit_ells = [e for e in ells if e in a.fit.fit_ells]
    out = {"vector": vector[mask], "labels": np.repeat(ells, len(s))[mask], "s": s,
           "full": vector, "z_eff": z_eff, "analysis": a, "fit_ells": fit_ells,
           "full_mask": np.concatenate([np.full(len(s), e in fit_ells) for e in ells])}
    for w in WEIGHTINGS:
        settings = dataclasses.replace(a.covariance, jackknife_weighting=w, cross_weight=0.0)
        cov = jackknife_from_counts(counts, a.estimate, settings, progress=False, check=False)
        out[w] = cov.matrix[np.ix_(mask, mask)]
        out[w + "_fitted_ells"] = cov.matrix[np.ix_(out["full_mask"], out["full_mask"])]
        out["n_regions"] = cov.n_samples
    return out


def bao_directions(mocks: list[dict], weighting: str, truth: tuple[float, float]) -> dict:
    """Linearised alpha estimators w (one per direction) from the mean data and covariance."""
    m0 = mocks[0]
    a = m0["analysis"]
    mean = np.mean([m["full"][m0["full_mask"]] for m in mocks], axis=0)
    cov = np.mean([m[weighting + "_fitted_ells"] for m in mocks], axis=0)
    like = build_likelihood(m0["s"], mean, cov, m0["fit_ells"],
                            cosmology=a.cosmology.build(),
                            z_eff=m0["z_eff"], settings=a.fit)
    theta = like.start()
    theta[:2] = truth
    theta[like.names.index("B")] = like.best_amplitude(like.physical(theta))

    def model(a_par, a_perp):
        t = theta.copy()
        t[:2] = a_par, a_perp
        return like.template_model(like.physical(t))

    out, step, Q = {}, 1e-3, like.marginal_precision
    for name, (dp, dt) in (("alpha_iso", (1, 1)), ("alpha_par", (1, 0)),
                           ("alpha_perp", (0, 1))):
        g = (model(truth[0] + step * dp, truth[1] + step * dt)
             - model(truth[0] - step * dp, truth[1] - step * dt)) / (2 * step)
        out[name] = Q @ g / (g @ Q @ g)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("configs", nargs="+", help="pipeline configs of finished mock runs")
    ap.add_argument("--truth", type=float, nargs=2, default=(1.0, 1.0),
                    metavar=("ALPHA_PAR", "ALPHA_PERP"),
                    help="dilations at which the template derivatives are taken")
    args = ap.parse_args(argv)
    if len(args.configs) < 3:
        ap.error("need at least 3 finished mock runs")
    try:
        mocks = [load_mock(c) for c in args.configs]
    except CorrpipeError as exc:
        raise SystemExit(f"error: {exc}") from None
    x = np.array([m["vector"] for m in mocks])
    n, p = x.shape
    labels = mocks[0]["labels"]
    dev = x - x.mean(axis=0)
    c_mock = dev.T @ dev / (n - 1)
    h = hartlap_factor(mocks[0]["n_regions"], p)
    print(f"{n} mocks, {p} fitted bins, {mocks[0]['n_regions']} jackknife regions, "
          f"Hartlap factor {h:.3f}")
    print(f"(one bin's mock variance is uncertain by {np.sqrt(2 / (n - 1)):.0%})")
    for w in WEIGHTINGS:
        jk = np.array([m[w] for m in mocks])
        ratio = np.diag(jk.mean(axis=0)) / np.diag(c_mock)
        per_ell = ", ".join(f"l={ell}: {np.median(ratio[labels == ell]):.2f}"
                            for ell in np.unique(labels))
        trace = np.mean([h * np.trace(np.linalg.solve(c, c_mock)) / p for c in jk])
        chi2 = np.mean([h * d @ np.linalg.solve(c, d) for c, d in zip(jk, dev)])
        print(f"\n{w}:")
        print(f"  mean jackknife variance / mock variance (median over bins): {per_ell}")
        print(f"  h tr(C_jk^-1 C_mock) / p = {trace:.2f}   (1 = calibrated; < 1: errors too "
              f"large, posterior widths scale as its -1/2 power: x{trace ** -0.5:.2f})")
        print(f"  mean chi^2 of deviations = {chi2:.1f}   (expected {p * (n - 1) / n:.1f})")
        for name, wvec in bao_directions(mocks, w, tuple(args.truth)).items():
            var_mock = np.var(dev @ wvec, ddof=1)
            var_jk = np.mean([wvec @ c @ wvec for c in jk])
            print(f"  {name:>10} direction: jackknife sd {np.sqrt(var_jk):.4f}, mock scatter "
                  f"{np.sqrt(var_mock):.4f}, variance ratio {var_jk / var_mock:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
