#!/usr/bin/env python
"""Fit the mean of a batch of mock runs, and compare two analyses of the same mocks mock by mock.

A fit to the mean multipoles of N mocks, with the covariance divided by N, tests the model and
the pipeline for a bias far below the error of a single mock (a bias that the per-mock
statistics of ``validate_mocks.py`` cannot resolve). With ``--paired`` it also compares the
per-mock medians of two configs run on the *same* catalogues (e.g. redshift space against the
real-space positions of the same galaxies): cosmic variance cancels in the difference, so a
small systematic difference shows up with a few tens of mocks.

Usage (after ``validate_mocks.py --out OUT``)::

    python scripts/fit_mock_mean.py OUT --batch survey
    python scripts/fit_mock_mean.py OUT --batch survey --config real.toml --paired demo.toml

``--config`` names the config file inside each mock folder (default: ``demo.toml`` for survey
mocks, ``run.toml`` for box mocks); ``--cov scatter`` uses the scatter of the mock vectors
(Hartlap-corrected) instead of the mean of the per-mock covariances. The truth is read from
each mock's truth file: the expected dilation of its true cosmology against the fiducial one
at the mean z_eff (survey), or the injected stretch (box).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

from corrpipe.checkpoint import open_checkpoint
from corrpipe.config import load_config
from corrpipe.cosmology import Cosmology
from corrpipe.covariance import CovarianceResult, hartlap_factor
from corrpipe.estimators import Estimate
from corrpipe.fit import fit_multipoles
from corrpipe.mocks import expected_dilation

QUANTITIES = ("alpha_par", "alpha_perp", "alpha", "epsilon")


def read_mock(config_path: Path) -> dict:
    """Multipoles, covariance, z_eff and fit summary of one mock run."""
    cfg = load_config(config_path)
    a = cfg.analyses[0]
    folder = cfg.analysis_folder(a)
    with open_checkpoint(folder / "estimate.h5") as h5:
        est = Estimate.from_hdf5_group(h5["estimate"])
        z_eff = float(h5.attrs["z_eff"])
    with open_checkpoint(folder / "covariance.h5") as h5:
        cov = CovarianceResult.from_hdf5_group(h5["covariance"])
    summary_path = folder / "summary.json"
    summary = json.loads(summary_path.read_text())["summary"] if summary_path.exists() else {}
    return {"analysis": a, "s": est.s, "ells": est.ells, "vector": est.vector("multipoles"),
            "cov": cov, "z_eff": z_eff, "summary": summary}


def truth_of(folder: Path, z_eff: float) -> tuple[float, float] | None:
    """Injected (alpha_par, alpha_perp) of one mock folder, or None if it has no truth file."""
    demo = folder / "truth.json"
    if demo.exists():
        doc = json.loads(demo.read_text())
        d = expected_dilation(Cosmology(**doc["true_cosmology"]),
                              Cosmology(**doc["fiducial_cosmology"]), z_eff)
        return d.alpha_par, d.alpha_perp
    for path in folder.glob("*_truth.json"):
        s = json.loads(path.read_text())["settings"]
        return float(s["alpha_par"]), float(s["alpha_perp"])
    return None


def derived_truth(a_par: float, a_perp: float) -> dict:
    """alpha and epsilon from alpha_par, alpha_perp (Xu et al. 2013)."""
    return {"alpha_par": a_par, "alpha_perp": a_perp, "alpha": float(np.cbrt(a_par * a_perp**2)),
            "epsilon": float(np.cbrt(a_par / a_perp) - 1.0)}


def mean_fit(mocks: list[dict], cov_kind: str, seed: int = 1):
    """Fit the mean multipoles with the covariance of the mean."""
    n = len(mocks)
    vectors = np.array([m["vector"] for m in mocks])
    a = mocks[0]["analysis"]
    s = mocks[0]["s"]
    in_range = (s >= a.fit.s_min) & (s <= a.fit.s_max)
    n_fit_bins = int(in_range.sum()) * len(a.fit.fit_ells)
    if cov_kind == "scatter":
        if n <= n_fit_bins + 4:
            raise SystemExit(f"--cov scatter needs more than {n_fit_bins + 4} mocks "
                             f"(the fit uses {n_fit_bins} bins); have {n}")
        cov = np.cov(vectors, rowvar=False) / n
        precision_factor = hartlap_factor(n, n_fit_bins)
    else:
        # the mean of N per-mock covariances rests on N times as many samples as one of
        # them, so its inverse needs no Hartlap factor (N * n_regions >> bins)
        cov = np.mean([m["cov"].matrix for m in mocks], axis=0) / n
        precision_factor = 1.0
    z_eff = float(np.mean([m["z_eff"] for m in mocks]))
    return fit_multipoles(s, vectors.mean(axis=0), cov, mocks[0]["ells"],
                          cosmology=a.cosmology.build(), z_eff=z_eff, settings=a.fit,
                          progress=False, seed=seed, covariance_type=f"mean of mocks ({cov_kind})",
                          precision_factor=precision_factor, name="mean"), z_eff


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", type=Path, help="validate_mocks.py working folder")
    ap.add_argument("--batch", default="survey", choices=("survey", "box"))
    ap.add_argument("--config", help="config file name inside each mock folder")
    ap.add_argument("--paired", help="second config name: per-mock differences of the medians")
    ap.add_argument("--cov", default="mean", choices=("mean", "scatter"),
                    help="covariance of the mean: mean of the per-mock ones / N, or the "
                         "scatter of the mock vectors / N")
    args = ap.parse_args(argv)
    name = args.config or ("demo.toml" if args.batch == "survey" else "run.toml")
    folders = sorted(p for p in args.out.glob(f"{args.batch}_*") if (p / name).exists())
    mocks, truths = [], []
    for folder in folders:
        try:
            m = read_mock(folder / name)
        except Exception as exc:  # an unfinished mock: say so and go on
            print(f"skip {folder.name}: {exc}")
            continue
        m["folder"] = folder
        mocks.append(m)
        truths.append(truth_of(folder, m["z_eff"]))
    if len(mocks) < 2:
        raise SystemExit(f"need at least 2 finished mocks with {name} under {args.out}")
    result, z_eff = mean_fit(mocks, args.cov)
    truth = None
    if all(t is not None for t in truths):
        truth = derived_truth(*np.mean(np.array(truths), axis=0))
    print(f"mean of {len(mocks)} {args.batch} mocks ({name}), z_eff = {z_eff:.4f}, "
          f"chi2 = {result.chi2:.1f} for {result.dof} dof (covariance: {args.cov} / N)")
    for q in QUANTITIES:
        st = result.summary[q]
        sigma = 0.5 * (st["p84"] - st["p16"])
        line = f"{q:>10}: {st['median']:.4f} +- {sigma:.4f}"
        if truth is not None:
            line += (f"  truth {truth[q]:.4f}  offset {st['median'] - truth[q]:+.4f} "
                     f"({(st['median'] - truth[q]) / sigma:+.2f} sigma of the mean)")
        print(line)
    if args.paired:
        other = {}
        for m in mocks:
            path = m["folder"] / args.paired
            if path.exists():
                try:
                    other[m["folder"]] = read_mock(path)["summary"]
                except Exception as exc:
                    print(f"skip {m['folder'].name} ({args.paired}): {exc}")
        pairs = [(m["summary"], other[m["folder"]]) for m in mocks
                 if m["folder"] in other and m["summary"] and other[m["folder"]]]
        print(f"\nper-mock medians, {name} minus {args.paired} ({len(pairs)} mocks):")
        for q in QUANTITIES:
            d = np.array([a[q]["median"] - b[q]["median"] for a, b in pairs])
            if len(d) > 1:
                print(f"{q:>10}: mean {d.mean():+.4f} +- {d.std(ddof=1) / np.sqrt(len(d)):.4f}"
                      f" (scatter {d.std(ddof=1):.4f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
