#!/usr/bin/env python
"""Fit the mean of a batch of mock runs, and compare two analyses of the same mocks mock by mock.

A fit to the mean multipoles of N mocks, with the covariance divided by N, tests the model and
the pipeline for a bias far below the error of a single mock (a bias that the per-mock
statistics of ``validate_mocks.py`` cannot resolve). With ``--paired`` it also compares the
per-mock medians of two configs run on the *same* catalogues (e.g. redshift space against the
real-space positions of the same galaxies), and with ``--paired-batch`` the same mocks of
another batch drawn from the same seeds (e.g. Zel'dovich against lognormal mocks of the same
initial phases): cosmic variance largely cancels in the difference, so a small systematic
difference shows up with a few tens of mocks.

Usage (after ``validate_mocks.py --out OUT``)::

    python scripts/fit_mock_mean.py OUT --batch survey
    python scripts/fit_mock_mean.py OUT --batch survey --config real.toml --paired demo.toml
    python scripts/fit_mock_mean.py OUT --batch survey --paired-batch OTHER_OUT
    python scripts/fit_mock_mean.py OUT --batch survey --predict
    python scripts/fit_mock_mean.py OUT --batch lines --analysis low --predict

``--config`` names the config file inside each mock folder (default: ``demo.toml`` for survey
mocks, ``run.toml`` for box mocks; ``--batch lines`` reads emission-line demo surveys made by
``corrpipe demo --output lines_NNN`` and ``--analysis`` picks the redshift bin); ``--cov
scatter`` uses the scatter of the mock vectors (Hartlap-corrected) instead of the mean of the
per-mock covariances. The truth is read from each mock's truth file: the expected dilation of
its true cosmology against the fiducial one at the mean z_eff (survey), or the injected
stretch (box).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from pathlib import Path

import numpy as np

from corrpipe.checkpoint import open_checkpoint
from corrpipe.config import load_config, tomllib, validate_section
from corrpipe.cosmology import Cosmology
from corrpipe.covariance import CovarianceResult, hartlap_factor
from corrpipe.errors import ConfigError
from corrpipe.estimators import Estimate
from corrpipe.fit import fit_multipoles
from corrpipe.fit.result import dilations_from_samples
from corrpipe.mocks import expected_dilation

QUANTITIES = ("alpha_par", "alpha_perp", "alpha", "epsilon")


def read_mock(config_path: Path, analysis: str | None = None) -> dict:
    """Multipoles, covariance, z_eff and fit summary of one mock run (its first analysis, or
    the named one)."""
    cfg = load_config(config_path)
    a = cfg.analysis(analysis) if analysis else cfg.analyses[0]
    folder = cfg.analysis_folder(a)
    with open_checkpoint(folder / "estimate.h5") as h5:
        est = Estimate.from_hdf5_group(h5["estimate"])
        z_eff = float(h5.attrs["z_eff"])
    with open_checkpoint(folder / "covariance.h5") as h5:
        cov = CovarianceResult.from_hdf5_group(h5["covariance"])
    summary_path = folder / "summary.json"
    doc = json.loads(summary_path.read_text()) if summary_path.exists() else {}
    detection = doc.get("diagnostics", {}).get("bao_detection", {}).get("significance_sigma")
    return {"analysis": a, "s": est.s, "ells": est.ells, "vector": est.vector("multipoles"),
            "cov": cov, "z_eff": z_eff, "summary": doc.get("summary", {}),
            "detection": np.nan if detection is None else float(detection),
            "xi_smu": est.xi_smu, "mu_edges": est.mu_edges}


def mock_settings_of(folder: Path):
    """The MockSettings a mock folder was drawn with (from its truth file), or None."""
    from corrpipe.mocks import MockSettings

    path = folder / "truth.json"
    if path.exists():
        doc = json.loads(path.read_text())
        if "target_mock" in doc:  # an emission-line demo survey (corrpipe.line_demo)
            tm, true = doc["target_mock"], doc["true_cosmology"]
            return MockSettings(kind="zeldovich", geometry="box", box_size=tm["box_size"],
                                n_mesh=tm["n_mesh"], nbar=tm["box_nbar"], bias=tm["bias"],
                                redshift=tm["box_redshift"], lagrangian_positions="cells",
                                rsd=bool(tm.get("rsd", True)), true_h=true["h"],
                                true_omega_m=true["omega_m"], true_omega_b=true["omega_b"],
                                true_w0=true["w0"])
        raw = doc["mock"]
    else:
        paths = sorted(folder.glob("*_truth.json"))
        if not paths:
            return None
        path = paths[0]
        raw = json.loads(path.read_text())["settings"]
    return validate_section(MockSettings, raw, "mock", str(path), folder)


def prediction_fit(mocks: list[dict], truth: dict, overrides=()):
    """Fit the Zel'dovich expectation of the batch's mocks with the mean fit's settings."""
    from corrpipe.fit.run import best_fit, build_likelihood
    from corrpipe.mocks import zeldovich_expectation

    settings = mock_settings_of(mocks[0]["folder"])
    if settings is None or settings.kind != "zeldovich":
        return None
    m0 = mocks[0]
    a = m0["analysis"]
    fit = fit_settings(a, list(overrides))
    vector = zeldovich_expectation(settings, m0["s"], m0["ells"], alpha_par=truth["alpha_par"],
                                   alpha_perp=truth["alpha_perp"],
                                   fiducial=a.cosmology.build()).ravel()
    cov = np.mean([m["cov"].matrix for m in mocks], axis=0) / len(mocks)
    like = build_likelihood(m0["s"], vector, cov, m0["ells"], cosmology=a.cosmology.build(),
                            z_eff=float(np.mean([m["z_eff"] for m in mocks])), settings=fit,
                            progress=False)
    best = best_fit(like)
    phys = like.physical(best)
    out = derived_truth(float(phys["alpha_par"]), float(phys["alpha_perp"]))
    out["chi2"] = float(like.chi2(best))
    out["vector"] = vector
    out["fit_range"] = (fit.s_min, fit.s_max)
    return out


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
    """alpha_par, alpha_perp and the alpha, epsilon they imply (Xu et al. 2013)."""
    out = dilations_from_samples(("alpha_par", "alpha_perp"), np.array([[a_par, a_perp]]))
    return {q: float(out[q][0]) for q in QUANTITIES}


def fit_settings(analysis, overrides: list[str]):
    """The [fit] settings the pipeline fits ``analysis`` with, plus ``KEY=VALUE`` overrides
    (TOML values, checked like the config's [fit] table)."""
    from corrpipe.fit import FitSettings
    from corrpipe.stages.fit import fit_settings_of

    settings = fit_settings_of(analysis)  # the post-reconstruction model when reconstructed
    if not overrides:
        return settings
    try:
        values = tomllib.loads("\n".join(overrides))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"--fit {' '.join(overrides)}: give KEY=VALUE with TOML values "
                          f"({exc})") from exc
    current = {f.name: getattr(settings, f.name) for f in dataclasses.fields(settings) if f.init}
    return validate_section(FitSettings, {**current, **values}, "fit", "--fit", Path("."))


def mean_fit(mocks: list[dict], cov_kind: str, seed: int = 1, overrides=()):
    """Fit the mean multipoles with the covariance of the mean."""
    n = len(mocks)
    vectors = np.array([m["vector"] for m in mocks])
    a = mocks[0]["analysis"]
    settings = fit_settings(a, list(overrides))
    s = mocks[0]["s"]
    in_range = (s >= settings.s_min) & (s <= settings.s_max)
    n_fit_bins = int(in_range.sum()) * len(settings.fit_ells)
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
                          cosmology=a.cosmology.build(), z_eff=z_eff, settings=settings,
                          progress=False, seed=seed, covariance_type=f"mean of mocks ({cov_kind})",
                          precision_factor=precision_factor, name="mean"), z_eff


def print_residuals(mocks: list[dict], pred: dict) -> None:
    """Mean multipoles against the noise-free expectation, bin by bin in the fit range, in
    units of the error of the mean (mean of the per-mock covariances / N)."""
    vectors = np.array([m["vector"] for m in mocks])
    mean = vectors.mean(axis=0)
    err = np.sqrt(np.diag(np.mean([m["cov"].matrix for m in mocks], axis=0)) / len(mocks))
    s, ells = mocks[0]["s"], mocks[0]["ells"]
    lo, hi = pred["fit_range"]
    print("\nmean minus expectation (error of the mean in brackets):")
    print("      s  " + "  ".join(f"{'xi_' + str(ell):>24}" for ell in ells))
    for i, si in enumerate(s):
        if not lo <= si <= hi:
            continue
        cells = []
        for j in range(len(ells)):
            k = j * len(s) + i
            expect = pred["vector"][k]
            cells.append(f"{mean[k]:+.5f} vs {expect:+.5f} ({(mean[k] - expect) / err[k]:+5.1f})")
        print(f"  {si:5.1f}  " + "  ".join(cells))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", type=Path, help="validate_mocks.py working folder")
    ap.add_argument("--batch", default="survey", choices=("survey", "box", "lines"),
                    help="mock folders to read: survey_*, box_* or lines_* (emission-line "
                         "demo surveys)")
    ap.add_argument("--analysis", help="analysis (redshift bin) to read from each mock's "
                                       "config (default: the first)")
    ap.add_argument("--config", help="config file name inside each mock folder")
    ap.add_argument("--paired", help="second config name: per-mock differences of the medians")
    ap.add_argument("--paired-batch", type=Path,
                    help="another validate_mocks folder with the same mock names (same seeds): "
                         "per-mock differences against its runs of --paired (or --config)")
    ap.add_argument("--cov", default="mean", choices=("mean", "scatter"),
                    help="covariance of the mean: mean of the per-mock ones / N, or the "
                         "scatter of the mock vectors / N")
    ap.add_argument("--predict", action="store_true",
                    help="also fit the noise-free Zel'dovich expectation of these mocks "
                         "(corrpipe.mocks.zeldovich_expectation): the offset a perfect mean "
                         "should show, BAO mode coupling included (~1 min)")
    ap.add_argument("--fit", action="append", default=[], metavar="KEY=VALUE",
                    help="override a [fit] setting of the mean fit (TOML value, e.g. "
                         "sigma_par=0.0); repeatable")
    args = ap.parse_args(argv)
    name = args.config or ("run.toml" if args.batch == "box" else "demo.toml")
    folders = sorted(p for p in args.out.glob(f"{args.batch}_*") if (p / name).exists())
    mocks, truths = [], []
    for folder in folders:
        try:
            m = read_mock(folder / name, args.analysis)
        except Exception as exc:  # an unfinished mock: say so and go on
            print(f"skip {folder.name}: {exc}")
            continue
        m["folder"] = folder
        mocks.append(m)
        truths.append(truth_of(folder, m["z_eff"]))
    if len(mocks) < 2:
        raise SystemExit(f"need at least 2 finished mocks with {name} under {args.out}")
    result, z_eff = mean_fit(mocks, args.cov, overrides=args.fit)
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
    if args.predict:
        if truth is None:
            print("--predict: the mocks have no truth files")
        else:
            pred = prediction_fit(mocks, truth, args.fit)
            if pred is None:
                print("--predict: only Zel'dovich mocks have a mode-coupling prediction")
            else:
                print(f"\nZel'dovich expectation of these mocks, fitted the same way "
                      f"(chi2 {pred['chi2']:.2f} with the covariance of the mean):")
                for q in QUANTITIES:
                    print(f"{q:>10}: {pred[q]:.4f}  offset {pred[q] - truth[q]:+.4f}")
                print_residuals(mocks, pred)
    if args.paired or args.paired_batch:
        other_name = args.paired or name
        base = args.paired_batch
        label = f"{base}/{other_name}" if base else other_name
        pairs = []
        for m in mocks:
            path = (base / m["folder"].name if base else m["folder"]) / other_name
            if not path.exists():
                continue
            try:
                other = read_mock(path, args.analysis)["summary"]
            except Exception as exc:  # an unfinished mock: say so and go on
                print(f"skip {path}: {exc}")
                continue
            if m["summary"] and other:
                pairs.append((m["summary"], other))
        print(f"\nper-mock medians, {name} minus {label} ({len(pairs)} mocks):")
        for q in QUANTITIES:
            d = np.array([a[q]["median"] - b[q]["median"] for a, b in pairs])
            if len(d) > 1:
                print(f"{q:>10}: mean {d.mean():+.4f} +- {d.std(ddof=1) / np.sqrt(len(d)):.4f}"
                      f" (scatter {d.std(ddof=1):.4f})")
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except ConfigError as exc:
        sys.exit(f"fit_mock_mean: {exc}")
