"""The real stages end to end on a small survey: skipping, fit-only reruns, damaged files,
SIGKILL mid-count, refit, CLI errors (issue 2, issue 5 'fit-only reruns').

Reference: common practice for resumable pipelines; numbers are compared with an uninterrupted
run of the same code (bitwise, as the pair counter promises results independent of
interruptions).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest

from corrpipe import api
from corrpipe.cli import main
from corrpipe.errors import ConfigError, StageError

ALL = ["load", "randoms", "counts", "estimate", "covariance", "fit", "report"]


def ran(outcome):
    return [s for s, o in outcome["main"].items() if o == "ran"]


def test_run_skip_and_fit_only_rerun(survey_run):
    cfg = survey_run
    assert ran(api.run(cfg, progress=False)) == ALL
    out = cfg.parent / "out"
    summary = json.loads((out / "summary.json").read_text())
    assert summary["analysis"] == "anisotropic"
    assert summary["covariance_type"] == "jackknife"
    assert 0.4 < summary["z_eff"] < 0.6
    for key in ("DM_over_rd", "DH_over_rd", "DV_over_rd"):
        assert key in summary["distances"]
    # second run skips everything
    assert ran(api.run(cfg, progress=False)) == []
    assert "stale" not in api.status_text(cfg)
    # a fit-only setting reruns only fit and report
    cfg.write_text(cfg.read_text().replace("s_min = 50.0", "s_min = 60.0"))
    text = api.status_text(cfg)
    assert "fit          stale     [fit] s_min changed" in text
    assert "counts       done" in text
    assert ran(api.run(cfg, progress=False)) == ["fit", "report"]
    assert json.loads((out / "summary.json").read_text())["fit_range"][0] == 60.0
    # refit works on the stored counts alone
    assert ran(api.refit(cfg, progress=False)) == ["fit", "report"]


def test_truncated_counts_are_recomputed_identically(survey_run):
    cfg = survey_run
    api.run(cfg, progress=False, until="counts")
    path = cfg.parent / "out" / "counts.h5"
    with h5py.File(path) as h5:
        before = h5["smu/DR/weighted"][()]
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 3])
    assert "counts       damaged" in api.status_text(cfg)
    assert ran(api.run(cfg, progress=False, until="counts")) == ["counts"]
    with h5py.File(path) as h5:
        assert np.array_equal(h5["smu/DR/weighted"][()], before)


def test_refit_refuses_without_counts(survey_run):
    with pytest.raises(StageError, match="refit of analysis 'main' needs stage 'load'.*never "
                                         "recounts"):
        api.refit(survey_run, progress=False)


def test_sigkill_during_counts_then_resume_matches(tmp_path, survey_inputs):
    BASE_CONFIG, write_poisson_survey = survey_inputs
    write_poisson_survey(tmp_path, n=8000, seed=5)
    text = BASE_CONFIG.replace("size_factor = 3", "size_factor = 4")
    cfg = tmp_path / "run.toml"
    cfg.write_text(text)
    ref = tmp_path / "ref.toml"
    ref.write_text(text.replace('output = "out"', 'output = "ref"'))
    api.run(ref, progress=False, until="counts")  # uninterrupted reference (and warm caches)

    proc = subprocess.Popen([sys.executable, "-m", "corrpipe.cli", "-q", "run", str(cfg),
                             "--until", "counts"], stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    out = tmp_path / "out"
    deadline = time.time() + 120
    while time.time() < deadline and proc.poll() is None:
        if list(out.glob(".counts.*.smu-DR.progress.h5")):
            break
        time.sleep(0.02)
    assert proc.poll() is None, "the count finished before it could be interrupted"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    assert not (out / "counts.h5").exists()
    outcome = api.run(cfg, progress=False, until="counts")
    assert ran(outcome) == ["counts"]
    assert not list(out.glob(".counts.*"))
    with h5py.File(out / "counts.h5") as a, h5py.File(tmp_path / "ref" / "counts.h5") as b:
        for name in ("DD", "DR", "RR"):
            assert np.array_equal(a[f"smu/{name}/weighted"][()], b[f"smu/{name}/weighted"][()])
            assert np.array_equal(a[f"smu/{name}/region_one"][()],
                                  b[f"smu/{name}/region_one"][()])


def test_cli_errors_are_one_line_with_exit_code(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[catalogue]\npath = 'x.fits'\n[counts]\nn_muu = 3\n")
    assert main(["check", str(bad)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1
    assert "unknown key 'n_muu'" in err and "did you mean 'n_mu'" in err
    assert main(["check", str(tmp_path / "missing.toml")]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_cross_table_check_fit_range_outside_counts(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[catalogue]\npath = 'x.fits'\n[counts]\ns_max = 120.0\n")
    with pytest.raises(ConfigError, match=r"fit range \[fit\] s_min..s_max = 50..150"):
        api.check(cfg)


BOX_CONFIG = """
[run]
output = "out"
[catalogue]
path = "box.h5"
kind = "box"
box_size = 600.0
los_axis = "z"
box_redshift = 0.5
[counts]
s_max = 160.0
n_s = 16
n_mu = 10
box_rr = "{box_rr}"
[covariance]
kind = "{cov}"
cubes_per_side = 3
bias = 1.0
[fit]
max_steps = 200
check_every = 100
n_walkers = 12
profile_points = 0
[report]
plots = false
"""


def _write_box(folder, n=6000, seed=2):
    rng = np.random.default_rng(seed)
    pos = rng.uniform(0.0, 600.0, (n, 3))
    with h5py.File(folder / "box.h5", "w") as h5:
        for i, c in enumerate("xyz"):
            h5.create_dataset(c, data=pos[:, i])


@pytest.mark.parametrize("box_rr, cov", [("analytic", "analytic"), ("randoms", "jackknife")])
def test_periodic_box_runs_through(tmp_path, box_rr, cov):
    # Poisson box: the analytic RR (common practice: N(N-1)/2 V_shell/V) makes DD/RR - 1 ~ 0.
    _write_box(tmp_path)
    cfg = tmp_path / "box.toml"
    cfg.write_text(BOX_CONFIG.format(box_rr=box_rr, cov=cov)
                   + ("[randoms]\nsize_factor = 2\n" if box_rr == "randoms" else ""))
    assert ran(api.run(cfg, progress=False)) == ALL
    with h5py.File(tmp_path / "out" / "estimate.h5") as h5:
        xi0 = h5["estimate/multipoles"][0]
        s = h5["estimate/s"][()]
    # Poisson expectation: |xi_0| of a few x N_pairs^-1/2 in the s > 40 Mpc/h bins
    n, volume = 6000, 600.0**3
    edges = np.linspace(0, 160, 17)
    n_pairs = 0.5 * n * n * 4 / 3 * np.pi * np.diff(edges**3) / volume
    far = s > 40
    assert np.all(np.abs(xi0[far]) < 6 / np.sqrt(n_pairs[far]))
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["covariance_type"] == cov
    assert summary["z_eff"] == 0.5


def test_reconstruction_stage_runs_and_switches_the_estimator(survey_run):
    # Shifted-random estimator (DD - 2DS + SS)/RR after reconstruction (Padmanabhan et al.
    # 2012); on a Poisson survey the shifts are small and xi stays consistent with zero.
    cfg = survey_run
    cfg.write_text(cfg.read_text() + "\n[reconstruct]\nenabled = true\nn_mesh = 64\n"
                   "bias = 1.5\nsmoothing = 20.0\n")
    outcome = api.run(cfg, progress=False)
    assert ran(outcome) == ["load", "randoms", "reconstruct", "counts", "estimate",
                            "covariance", "fit", "report"]
    out = cfg.parent / "out"
    with h5py.File(out / "counts.h5") as h5:
        assert set(h5["smu"]) == {"DD", "DS", "SS", "RR"}
        assert bool(h5.attrs["reconstructed"])
    with h5py.File(out / "fit.h5") as h5:
        settings = json.loads(h5["fit"].attrs["settings_json"])
    assert settings["reconstructed"] is True and settings["smoothing_radius"] == 20.0
    # turning reconstruction off reruns counts onwards, not the randoms
    cfg.write_text(cfg.read_text().replace("enabled = true", "enabled = false"))
    assert ran(api.run(cfg, progress=False)) == ["counts", "estimate", "covariance", "fit",
                                                 "report"]
