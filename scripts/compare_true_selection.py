"""Re-analyse emission-line demo mocks with randoms drawn from their TRUE per-class selection.

The demo draws random redshifts by shuffling the data's redshifts within each depth class
(``[randoms] redshifts = "shuffle_by_class"``). This script takes the mock folders of a
``scripts/validate_mocks.py --n-lines`` run, writes each class's true dN/dz (the
``corrpipe.line_demo.class_selection`` density times the shell volume of the true cosmology,
320 redshift bins), reruns the same analysis with ``redshifts = "table"`` in a sibling folder
(same catalogue, footprint and config otherwise) and prints, per mock and bin, the BAO
detection and the dilations of both runs with their paired difference in units of the
class-shuffle error. It separates the class shuffle's effect (radial integral constraint)
from the other suspects of the demo's detection shortfall (DEVELOPERS.md, known limits).

Usage: ``python scripts/compare_true_selection.py RUN_FOLDER [--mocks 10 13] [--out DIR]``
(``RUN_FOLDER`` holds ``lines_NNN`` folders). About 2 minutes per mock on 2 cores.
Not part of the test suite.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np

from corrpipe import line_demo

INPUTS = ("marrowdeep_lae.fits", "marrowdeep_fields.ecsv", "invented_lowz_bao.ecsv", "truth.json")


def summary(folder: Path, name: str) -> dict:
    s = json.loads((folder / "results" / name / "summary.json").read_text())
    det = s.get("diagnostics", {}).get("bao_detection", {}).get("significance_sigma", np.nan)
    out = {"detection": float(det)}
    for key in ("alpha_par", "alpha_perp"):
        q = s["summary"][key]
        out[key] = (float(q["median"]), 0.5 * (float(q["p84"]) - float(q["p16"])))
    return out


def rerun(src: Path, dst: Path) -> None:
    """Copy one mock's analysis with table randoms into ``dst`` and run it."""
    truth = json.loads((src / "truth.json").read_text())
    if dst.exists():
        shutil.rmtree(dst)
    dst.mkdir(parents=True)
    for name in INPUTS:
        (dst / name).symlink_to((src / name).resolve())
    line_demo.true_selection_table(truth.get("scale", "demo")).write(
        dst / "true_selection.ecsv")
    config = (src / "demo.toml").read_text()
    old = 'redshifts = "shuffle_by_class"'
    if old not in config:
        sys.exit(f"{src / 'demo.toml'}: no '{old}' line in [randoms]; not an emission-line demo "
                 "config made by corrpipe")
    config = config.replace(old, 'redshifts = "table"\nselection_file = "true_selection.ecsv"')
    (dst / "demo.toml").write_text(config)
    if subprocess.run(["corrpipe", "run", str(dst / "demo.toml"), "-q"], check=False).returncode:
        sys.exit(f"corrpipe run {dst / 'demo.toml'} failed (its message is above)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("run", type=Path,
                        help="a validate_mocks.py --out folder (lines_NNN inside)")
    parser.add_argument("--mocks", type=int, nargs="*", help="mock indices (default: all)")
    parser.add_argument("--out", type=Path,
                        help="where the reruns go (default: RUN/true_selection)")
    args = parser.parse_args()
    if not args.run.is_dir():
        sys.exit(f"{args.run} is not a folder; give the --out folder of a validate_mocks.py "
                 "--n-lines run")
    folders = sorted(args.run.glob("lines_[0-9][0-9][0-9]"))
    if args.mocks:
        folders = [f for f in folders if int(f.name[-3:]) in set(args.mocks)]
    folders = [f for f in folders if (f / "results" / "low" / "summary.json").is_file()]
    if not folders:
        sys.exit(f"{args.run}: no finished lines_NNN mock folders (with results/*/summary.json)")
    out = args.out or args.run / "true_selection"
    gains = {}
    print(f"{'mock':9s} {'bin':5s} {'detection shuffle -> true':>26s} "
          f"{'alpha_par shift/sigma':>22s} {'alpha_perp shift/sigma':>23s}")
    for src in folders:
        dst = out / src.name
        rerun(src, dst)
        for name in ("low", "high"):
            a, b = summary(src, name), summary(dst, name)
            gains.setdefault(name, []).append(b["detection"] - a["detection"])
            shifts = [(b[k][0] - a[k][0]) / a[k][1] for k in ("alpha_par", "alpha_perp")]
            print(f"{src.name:9s} {name:5s} {a['detection']:12.1f} -> {b['detection']:4.1f} sigma "
                  f"{shifts[0]:+22.2f} {shifts[1]:+23.2f}", flush=True)
    for name, g in gains.items():
        g = np.asarray(g)
        err = g.std(ddof=1) / np.sqrt(g.size) if g.size > 1 else float("nan")
        print(f"bin {name}: mean detection gain {g.mean():+.2f} +- {err:.2f} sigma over "
              f"{g.size} mocks")


if __name__ == "__main__":
    main()
