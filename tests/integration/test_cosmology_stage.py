"""The batch stage ``cosmology`` on real stored fits of a two-bin survey: runs after the
analyses, skips when up to date, reruns alone on stored results, refuses overlapping bins and
missing fits with one-line errors, writes constraints.json, the chain and the plots.

References: common practice for resumable pipelines (a result is recomputed exactly when
something it depends on changed). The external measurements are the DESI 2024 table [from
memory] of REFERENCES §14; with it, the fitted Omega_m must stay near that table's own
result (0.295 +- 0.015, DESI Collaboration 2024 [from memory]), since the two Poisson bins
(no BAO) carry almost no information.
"""

from __future__ import annotations

import json
from pathlib import Path

import h5py
import pytest

from corrpipe import api
from corrpipe.cli import main
from corrpipe.errors import ConfigError, InputError, StageError

TABLE = (Path(__file__).parents[1] / "validation" / "data"
         / "desi2024_bao_table1_memory.ecsv")

EXPANSION = f"""
[expansion]
enabled = true
model = "flat-lcdm"
external = ["{TABLE}"]
max_steps = 3000
"""

BINS = """
[analyses.near]
catalogue = { z_max = 0.5 }

[analyses.far]
catalogue = { z_min = 0.5 }
"""


@pytest.fixture
def two_bins(tmp_path, survey_inputs):
    base, write = survey_inputs
    write(tmp_path, n=3000)
    cfg = tmp_path / "bins.toml"
    cfg.write_text(base.replace("max_steps = 400", "max_steps = 200") + EXPANSION + BINS)
    return cfg


def test_stage_runs_after_the_bins_then_skips_and_reruns_alone(two_bins):
    cfg = two_bins
    outcome = api.run(cfg, progress=False)
    assert outcome["<batch>"] == {"cosmology": "ran"}
    out = cfg.parent / "out"
    constraints = json.loads((out / "constraints.json").read_text())
    labels = {row["label"] for row in constraints["data"]}
    assert {"near", "far", "BGS", "Lya"} <= labels
    for name in ("near", "far"):
        fit = json.loads((out / name / "summary.json").read_text())
        rows = [r for r in constraints["data"] if r["label"] == name]
        assert rows[0]["z"] == pytest.approx(fit["z_eff"])
    om = constraints["constraints"]["Omega_m"]
    assert abs(om["median"] - 0.295) < 0.5 * 0.015
    assert constraints["dof"] == 12 + 4 - 2
    assert (out / "cosmology" / "distances.png").stat().st_size > 1000
    assert (out / "cosmology" / "contours.png").stat().st_size > 1000
    with h5py.File(out / "cosmology.h5") as h5:
        assert h5["cosmology"]["chain"].shape[2] == 2
    # up to date: nothing reruns
    assert api.run(cfg, progress=False)["<batch>"] == {"cosmology": "skipped"}
    assert "cosmology    done" in api.status_text(cfg)
    # a change of the [expansion] table reruns only the batch stage
    cfg.write_text(cfg.read_text().replace("max_steps = 3000", "max_steps = 3000\nplots = false"))
    assert "cosmology    stale" in api.status_text(cfg)
    outcome = api.run(cfg, progress=False)
    assert "ran" not in outcome["near"].values() and "ran" not in outcome["far"].values()
    assert outcome["<batch>"] == {"cosmology": "ran"}
    # the command alone on stored results: skipped when current, rerun with --force
    assert main(["-q", "cosmology", str(cfg)]) == 0
    assert main(["-q", "cosmology", str(cfg), "--force"]) == 0
    # a bin whose fit is gone is a one-line error naming it
    (out / "far" / "fit.h5").unlink()
    with pytest.raises(StageError, match="analysis 'far': stage 'fit' is missing") as exc:
        api.cosmology(cfg, progress=False)
    assert "\n" not in str(exc.value)


def test_overlapping_bins_are_refused_unless_declared(tmp_path):
    from corrpipe.cosmo.data import BinSamples
    from corrpipe.cosmo.run import build_likelihood
    from corrpipe.cosmo.settings import ExpansionSettings
    import numpy as np

    rng = np.random.default_rng(0)
    bins = [BinSamples(n, z, ("DV_over_rd",), rng.normal(v, 0.2, (500, 1)))
            for n, z, v in (("a", 0.45, 11.8), ("b", 0.62, 15.0))]
    ranges = {"a": (0.3, 0.6), "b": (0.55, 0.8)}
    with pytest.raises(InputError, match="'a' .* and 'b' .* overlap in redshift") as exc:
        build_likelihood(ExpansionSettings(), bins, ranges)
    assert "\n" not in str(exc.value)
    like, notes = build_likelihood(ExpansionSettings(independent=True), bins, ranges)
    assert like.data.n == 2 and "declared independent" in notes[0]
    like, _ = build_likelihood(ExpansionSettings(), bins, {"a": (0.3, 0.55), "b": (0.55, 0.8)})
    assert like.data.n == 2


def test_config_errors_of_the_expansion_table(tmp_path, survey_inputs):
    base, write = survey_inputs
    write(tmp_path, n=200)
    cfg = tmp_path / "bad.toml"
    cfg.write_text(base + "\n[expansion]\nenabled = true\nr_d_prior = [147.0]\n")
    with pytest.raises(ConfigError, match=r"r_d_prior = \[147.0\] must be \[mean, sigma\]"):
        api.check(cfg)
    cfg.write_text(base + "\n[expansion]\nenabled = true\nanalyses = ['nowhere']\n")
    with pytest.raises(ConfigError, match="no analysis 'nowhere'"):
        api.cosmology(cfg, progress=False)
