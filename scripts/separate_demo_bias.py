#!/usr/bin/env python
"""Separate the sources of the emission-line demo's dilation bias on the same seeds.

The demo's low bin (1.9 < z < 2.6, no interlopers there) is analysed on N seeds in variants
that change one piece of the chain each, and the fit to the MEAN of the N mocks (covariance
/ N) is compared with the truth; variants of one catalogue are also compared mock by mock
(paired differences, in units of each mock's error), where cosmic variance cancels:

- ``class``: the demo's analysis (randoms shuffled within depth classes, FKP weights);
- ``true``: the same catalogues, randoms from the true per-class dN/dz (no radial
  integral constraint from the shuffle);
- ``nofkp``: the same catalogues and randoms, no FKP weights;
- ``real``: the same boxes carved without redshift-space distortions (class analysis).

It also prints the mean multipoles and mu-wedges against the noise-free Zel'dovich
expectation of the mocks (``corrpipe.mocks.zeldovich_expectation``) at the BAO peak.

Usage::

    python scripts/separate_demo_bias.py OUT --seeds 3000 3019
    python scripts/separate_demo_bias.py OUT --report        # tables of what OUT holds

About 1 minute per seed and variant on 2 cores (the interlopers are left out: the low bin
has none below z = 2.55). Resumable: finished runs are skipped. Not part of the test suite.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy.special import eval_legendre

sys.path.insert(0, str(Path(__file__).resolve().parent))
from fit_mock_mean import mean_fit, mock_settings_of, read_mock, truth_of  # noqa: E402

from corrpipe import api, line_demo  # noqa: E402
from corrpipe.mocks import zeldovich_expectation  # noqa: E402

VARIANTS = ("class", "true", "nofkp", "real")
WEDGES = ((0.0, 0.5), (0.5, 1.0))


def folder_of(out: Path, variant: str, seed: int) -> Path:
    """Catalogue folder: the real-space variant has its own catalogues."""
    return out / (f"real_{seed}" if variant == "real" else f"rsd_{seed}")


def config_text(variant: str, seed: int) -> str:
    text = line_demo.line_demo_config_text("demo", "marrowdeep_lae.fits",
                                           "marrowdeep_fields.ecsv", "invented_lowz_bao.ecsv",
                                           seed=seed, output=f"results_{variant}",
                                           bins=line_demo.BINS[:1], expansion=False)
    if variant == "true":
        text = text.replace('redshifts = "shuffle_by_class"',
                            'redshifts = "table"\nselection_file = "true_selection.ecsv"')
    elif variant == "nofkp":
        text = text.replace("fkp = true", "fkp = false")
    return text


def run_seed(out: Path, seed: int, variants) -> None:
    for variant in variants:
        folder = folder_of(out, variant, seed)
        if not (folder / "truth.json").exists():
            line_demo.write_line_demo_inputs(folder, seed=seed, progress=False,
                                             rsd=variant != "real", interlopers=False)
            line_demo.true_selection_table("demo").write(folder / "true_selection.ecsv",
                                                         overwrite=True)
        config = folder / f"{variant}.toml"
        config.write_text(config_text(variant, seed))
        api.run(config, progress=False)
        print(f"seed {seed}: {variant} done", flush=True)


def collect(out: Path, variant: str) -> list[dict]:
    mocks = []
    for folder in sorted(out.glob("real_*" if variant == "real" else "rsd_*")):
        config = folder / f"{variant}.toml"
        if not config.exists():
            continue
        try:
            m = read_mock(config)
        except (OSError, KeyError, ValueError):
            continue  # unfinished run
        m["folder"] = folder
        m["seed"] = int(folder.name.split("_")[1])
        mocks.append(m)
    return mocks


def quantity(summary: dict, key: str) -> tuple[float, float]:
    q = summary[key]
    return float(q["median"]), 0.5 * (float(q["p84"]) - float(q["p16"]))


def peak_table(mocks: list[dict]) -> None:
    """Mean xi_0 and wedges at 85-125 Mpc/h against the Zel'dovich expectation."""
    m0 = mocks[0]
    alpha_par, alpha_perp = truth_of(m0["folder"], float(np.mean([m["z_eff"] for m in mocks])))
    ells = (0, 2, 4, 6)
    model = zeldovich_expectation(mock_settings_of(m0["folder"]), m0["s"], ells,
                                  alpha_par=alpha_par, alpha_perp=alpha_perp,
                                  fiducial=m0["analysis"].cosmology.build())
    xsm = np.array([m["xi_smu"] for m in mocks])
    mu_c = 0.5 * (m0["mu_edges"][1:] + m0["mu_edges"][:-1])
    n = len(mocks)
    print("      s   xi_0 mean +- err   expect  ratio | mu<0.5 mean   expect ratio | "
          "mu>0.5 mean   expect ratio")
    for i, s in enumerate(m0["s"]):
        if not 80 <= s <= 130:
            continue
        row = []
        xi0 = xsm[:, i, :].mean(axis=1)
        row.append(f"{xi0.mean():+.5f} +- {xi0.std(ddof=1) / np.sqrt(n):.5f} "
                   f"{model[0, i]:+.5f} {xi0.mean() / model[0, i]:5.2f}")
        for lo, hi in WEDGES:
            sel = (mu_c > lo) & (mu_c < hi)
            w = xsm[:, i, sel].mean(axis=1)
            mu = np.linspace(lo, hi, 201)
            expect = float(sum(model[j, i] * eval_legendre(ell, mu)
                               for j, ell in enumerate(ells)).mean())
            row.append(f"{w.mean():+.5f} +- {w.std(ddof=1) / np.sqrt(n):.5f} {expect:+.5f} "
                       f"{w.mean() / expect:5.2f}")
        print(f"  {s:5.1f}  " + " | ".join(row))


def report(out: Path) -> None:
    by_variant = {v: collect(out, v) for v in VARIANTS}
    print("mean fit (covariance of the mean): offset from the truth in its own error")
    for variant, mocks in by_variant.items():
        if len(mocks) < 2:
            continue
        fit, z_eff = mean_fit(mocks, "mean")
        truth = truth_of(mocks[0]["folder"], z_eff)
        cells = []
        for key, t in zip(("alpha_par", "alpha_perp"), truth):
            med, err = quantity(fit.summary, key)
            cells.append(f"{key} {med:.4f} +- {err:.4f} (truth {t:.4f}, "
                         f"{(med - t) / err:+.2f} sigma)")
        det = np.nanmedian([m["detection"] for m in mocks])
        print(f"  {variant:6s} n={len(mocks):3d}  " + "  ".join(cells)
              + (f"  median detection {det:.2f}" if np.isfinite(det) else ""))
    base = {m["seed"]: m for m in by_variant["class"]}
    print("paired per-mock differences from 'class' (medians, in each mock's class error):")
    for variant in ("true", "nofkp", "real"):
        pairs = [(base[m["seed"]]["summary"], m["summary"]) for m in by_variant[variant]
                 if m["seed"] in base]
        if len(pairs) < 2:
            continue
        cells = []
        for key in ("alpha_par", "alpha_perp"):
            diff = np.array([(quantity(o, key)[0] - quantity(b, key)[0]) / quantity(b, key)[1]
                             for b, o in pairs])
            cells.append(f"{key} {diff.mean():+.2f} +- {diff.std(ddof=1) / np.sqrt(diff.size):.2f}")
        print(f"  {variant:6s} n={len(pairs):3d}  " + "  ".join(cells))
    for variant, mocks in by_variant.items():
        if len(mocks) >= 2:
            print(f"\n{variant}: mean xi(s, mu) at the peak vs the Zel'dovich expectation "
                  f"({len(mocks)} mocks)")
            peak_table(mocks)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", type=Path, help="working folder (created)")
    ap.add_argument("--seeds", type=int, nargs=2, metavar=("FIRST", "LAST"),
                    help="seed range, inclusive (the demo validation uses 3000-3019)")
    ap.add_argument("--variants", default=",".join(VARIANTS),
                    help=f"comma-separated subset of {','.join(VARIANTS)}")
    ap.add_argument("--report", action="store_true", help="only print the tables")
    args = ap.parse_args(argv)
    variants = [v for v in args.variants.split(",") if v]
    unknown = sorted(set(variants) - set(VARIANTS))
    if unknown:
        ap.error(f"unknown variant(s) {unknown}; choose from {list(VARIANTS)}")
    if not args.report:
        if not args.seeds:
            ap.error("give --seeds FIRST LAST, or --report")
        for seed in range(args.seeds[0], args.seeds[1] + 1):
            run_seed(args.out, seed, variants)
    report(args.out)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
