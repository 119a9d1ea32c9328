"""Interloper config glue: [[mock.interlopers]] tables, [fit] interloper keys, truth files and
one-line errors (issue 17).

References: common practice for the error contract (one line naming the key, the bad value
and the fix); binomial statistics of the realised fractions (each object of the mixed box is
an interloper with probability f; Poisson draws per population, common practice).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

from pathlib import Path

import pytest

import corrpipe
from corrpipe.config import load_config, load_mock_config
from corrpipe.errors import ConfigError
from corrpipe.mocks import write_mocks

MOCK = """[mock]
kind = "lognormal"
box_size = 200.0
n_mesh = 64
nbar = 1e-3
bias = 1.8
redshift = 1.2
target_line = "{target}"
format = "hdf5"

[[mock.interlopers]]
line = "{line}"
fraction = {fraction}
bias = 1.3
"""


def _mock(tmp_path, **kw):
    values = dict(target="OIII5007", line="Ha", fraction=0.1)
    values.update(kw)
    path = tmp_path / "mock.toml"
    path.write_text(MOCK.format(**values))
    return path


def test_mock_truth_records_the_fractions(tmp_path):
    settings, _ = load_mock_config(_mock(tmp_path))
    files = write_mocks(settings, tmp_path / "out", progress=False)
    truth = json.loads(files[0].truth.read_text())["interlopers"]
    assert truth["fractions_requested"] == [0.1]
    n_target, n_int = truth["n_per_population"]
    n = n_target + n_int
    assert n == files[0].n_objects
    # realised share within 4 binomial sigma of the request
    assert abs(truth["fractions_realised"][0] - 0.1) < 4 * (0.1 * 0.9 / n) ** 0.5
    assert abs(truth["mappings"][0]["gamma_perp"] - 1.537) < 1e-3


@pytest.mark.parametrize("kw,match", [
    (dict(fraction=1.2), r"fraction = 1.2 must lie in \[0, 1\)"),
    (dict(fraction=-0.1), r"must lie in \[0, 1\)"),
    (dict(line="Hdelta"), "unknown emission line 'Hdelta'"),
    # Ly-alpha read as H-alpha at z = 1.2 would sit at z = 10.9: no valid redshift in range
    (dict(target="Ha", line="Lya"), "no valid redshift in range"),
    # H-alpha read as Ly-alpha at z = 1.2 would need a negative true redshift
    (dict(target="Lya", line="Ha"), "cannot be assigned z = 1.2"),
])
def test_bad_mock_interlopers_are_one_line_errors(tmp_path, kw, match):
    with pytest.raises(ConfigError, match=match) as info:
        load_mock_config(_mock(tmp_path, **kw))
    assert "\n" not in str(info.value) and "mock.interlopers[0]" in str(info.value)


def test_survey_range_and_box_fraction_checks(tmp_path):
    # a survey checks the whole assigned range: H-alpha cannot land at z = 0.15 as [O III]
    # (it would need z_true < 0); a box has one redshift, so f(z) is refused there
    path = _mock(tmp_path)
    path.write_text(path.read_text().replace('format = "hdf5"',
                                             'format = "hdf5"\ngeometry = "survey"'))
    with pytest.raises(ConfigError, match="cannot be assigned z = 0.15"):
        load_mock_config(path)
    path = _mock(tmp_path, fraction="[0.05, 0.1]\nfraction_z = [1.0, 1.4]")
    with pytest.raises(ConfigError, match="needs survey mocks"):
        load_mock_config(path)
    path = _mock(tmp_path, fraction="[0.05, 0.1]")
    with pytest.raises(ConfigError, match="needs fraction_z"):
        load_mock_config(path)


def test_fit_interloper_keys_and_cli_error(tmp_path):
    (tmp_path / "galaxies.csv").write_text("RA,DEC,Z\n10.0,1.0,1.2\n")
    cfg = tmp_path / "run.toml"
    good = ('[catalogue]\npath = "galaxies.csv"\n[fit]\ntarget_line = "OIII5007"\n'
            'interloper_line = "Ha"\ninterloper_fraction = 0.03\n'
            'interloper_fraction_width = 0.02\ninterloper_bias_width = 0.3\n')
    cfg.write_text(good)
    fit = load_config(cfg).analyses[0].fit
    assert fit.interloper_term and fit.n_sampled_parameters == 6
    cfg.write_text(good.replace("interloper_fraction = 0.03", "interloper_fraction = 1.0"))
    proc = subprocess.run([sys.executable, "-c",
                           "from corrpipe.cli import main; raise SystemExit(main())",
                           "check", str(cfg)], capture_output=True, text=True, cwd=tmp_path,
                          timeout=300, env=dict(os.environ, PYTHONPATH=str(
                              Path(corrpipe.__file__).resolve().parents[1])))
    lines = [line for line in proc.stderr.splitlines() if line.strip()]
    assert proc.returncode == 2 and len(lines) == 1, proc.stderr
    assert "interloper_fraction" in lines[0] and "Traceback" not in proc.stderr


def test_pipeline_fit_with_interloper_term_reports_the_shift(tmp_path):
    # A mixed interloper box through the whole pipeline (analytic RR and covariance, a short
    # chain): summary.json holds the posterior of f and the dilation shift of the term
    # (the report contract; numbers are not checked, the box is far too small).
    from corrpipe import api

    path = _mock(tmp_path)
    path.write_text(path.read_text().replace("box_size = 200.0", "box_size = 600.0")
                    .replace("nbar = 1e-3", "nbar = 3e-5"))
    settings, _ = load_mock_config(path)
    files = write_mocks(settings, tmp_path, progress=False)
    cfg = tmp_path / "run.toml"
    cfg.write_text(f"""
[run]
output = "out"
[catalogue]
path = "{files[0].data.name}"
kind = "box"
box_size = 600.0
los_axis = "z"
box_redshift = 1.2
[counts]
s_max = 160.0
n_s = 16
n_mu = 10
[covariance]
kind = "analytic"
bias = 1.8
[fit]
max_steps = 200
check_every = 100
n_walkers = 12
profile_points = 0
target_line = "OIII5007"
interloper_line = "Ha"
interloper_fraction = 0.1
interloper_fraction_width = 0.05
interloper_bias = 1.3
[report]
plots = false
""")
    api.run(cfg, progress=False)
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert "interloper_fraction" in summary["summary"]
    inter = summary["diagnostics"]["interlopers"]
    assert set(inter["shift"]) == {"alpha_par", "alpha_perp", "alpha"}
    assert abs(inter["mapping"]["z_true"] - 0.6784) < 1e-3


SURVEY = """[mock]
kind = "lognormal"
geometry = "survey"
box_size = 600.0
n_mesh = 64
nbar = 3e-4
bias = 1.8
redshift = 0.2
z_min = 0.15
z_max = 0.25
replicate = true
randoms_factor = 0
target_line = "OIII5007"
format = "hdf5"

[[mock.interlopers]]
line = "Hb"
fraction = [0.05, 0.15]
fraction_z = [0.15, 0.25]
bias = 1.2
"""


def test_survey_mock_interlopers_follow_their_fraction_and_wavelength_ratio(tmp_path):
    # f(z) linear in assigned z: the realised share in each of five z bins matches f at the
    # bin centre within 4 binomial sigma (common practice); every interloper's assigned and
    # cosmological redshifts obey (1 + z_a) / (1 + z_true) = lambda_Hb / lambda_OIII up to its
    # peculiar velocity (linear flows, |v| < 3000 km/s, so |v|/c < 1e-2; median ~0) --
    # REFERENCES §15.
    import h5py
    import numpy as np

    from corrpipe.theory.interlopers import REST_WAVELENGTHS

    path = tmp_path / "survey.toml"
    path.write_text(SURVEY)
    settings, _ = load_mock_config(path)
    files = write_mocks(settings, tmp_path / "out", progress=False)
    truth = json.loads(files[0].truth.read_text())["interlopers"]
    edges = np.array(truth["z_bin_edges"])
    centres = 0.5 * (edges[1:] + edges[:-1])
    expected = np.interp(centres, [0.15, 0.25], [0.05, 0.15])
    n_bin = np.array(truth["n_per_bin"])
    got = np.array(truth["fractions_realised"][0])
    assert np.all(np.abs(got - expected) < 4 * np.sqrt(expected * (1 - expected) / n_bin)), \
        (got, expected, n_bin)
    with h5py.File(files[0].data) as h5:
        table = h5[list(h5.keys())[0]][()]
    pop = table["POPULATION"]
    z, z_true = table["Z"][pop == 1], table["Z_COSMO"][pop == 1]
    ratio = REST_WAVELENGTHS["Hb"] / REST_WAVELENGTHS["OIII5007"]
    assert z.size > 100 and np.all((z >= 0.15) & (z < 0.25))
    assert np.max(np.abs((1 + z) / (1 + z_true) / ratio - 1)) < 1e-2
    assert abs(np.median((1 + z) / (1 + z_true) / ratio - 1)) < 2e-4
