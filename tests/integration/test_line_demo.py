"""``corrpipe demo --survey lines`` (the emission-line survey) end to end at its reduced "test"
size: the whole chain (field mosaic, depth classes, [O II] interlopers from their own mock,
two redshift bins, class-shuffled randoms, jackknife over whole fields, the interloper term,
the expansion-history fit) runs and reports against the truth. The survey is invented (demo
data); the checks compare with independent computations named beside each.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from astropy.table import Table

from corrpipe.api import demo as run_demo
from corrpipe.line_demo import (BINS, class_selection, demo_fields, interloper_fraction,
                                true_expansion)
from corrpipe.theory.interlopers import rest_wavelength


@pytest.mark.slow
def test_line_demo_runs_the_whole_chain(tmp_path):
    lines = []
    out = run_demo(tmp_path / "demo", scale="test", survey="lines", progress=False,
                   echo=lines.append)
    text = "\n".join(lines)
    folder = tmp_path / "demo"
    truth = json.loads((folder / "truth.json").read_text())
    results = folder / "results"
    for name, _, _ in BINS:
        summary = json.loads((results / name / "summary.json").read_text())
        assert (results / name / "report" / "multipoles.png").exists()
        rows = out["bins"][name]
        # the printed truth is the dilation of the true cosmology against the fiducial at the
        # pipeline's z_eff (Xu et al. 2013 definitions, REFERENCES sec. 7): D_M ratio of
        # astropy distances (independent of corrpipe's integrator) over the r_d ratio
        true, fid = true_expansion()
        z = summary["z_eff"]
        dm = (true.astropy().comoving_transverse_distance(z).value / true.sound_horizon()) / (
            fid.astropy().comoving_transverse_distance(z).value / fid.sound_horizon())
        assert rows["alpha_perp"]["truth"] == pytest.approx(dm, rel=1e-5)
        assert np.isfinite(rows["detection_sigma"])
        for key in ("alpha_par", "alpha_perp", "DM_over_rd", "DH_over_rd"):
            assert rows[key]["error"] > 0
            s = summary["summary"].get(key) or summary["distances"][key]
            assert s["p025"] < s["p16"] < s["median"] < s["p84"] < s["p975"]
    # the high bin fits the interloper term and reports its fraction against the truth
    assert "interloper_fraction" in out["bins"]["high"]
    assert "interloper_fraction" not in out["bins"]["low"]
    constraints = json.loads((results / "constraints.json").read_text())
    assert set(constraints["parameters"]) == {"Omega_m", "h_rd", "w"}
    assert {"Omega_m", "h_rd", "w"} <= set(out["expansion"])
    assert (results / "cosmology" / "distances.png").exists()
    assert (results / "cosmology" / "contours.png").exists()
    assert out["expansion"]["w"]["truth"] == -0.85 and "expansion history" in text
    assert truth["n_interlopers"] > 0 and truth["fictional"] is True


def test_interloper_share_of_the_written_catalogue(tmp_path):
    # the interlopers make interloper_fraction(z) of the sample (binomial, common practice):
    # realised share in 2.9 <= z < 3.5 within 4 standard errors of the requested 5 %
    from corrpipe.line_demo import write_line_demo_inputs

    inputs = write_line_demo_inputs(tmp_path, seed=3, scale="test", progress=False)
    cat = Table.read(inputs.data)
    z, pop = np.asarray(cat["Z"]), np.asarray(cat["POPULATION"])
    sel = z >= 2.9
    share = np.mean(pop[sel] == 1)
    expect = float(interloper_fraction(3.2))
    assert abs(share - expect) < 4 * np.sqrt(expect * (1 - expect) / sel.sum())
    assert np.mean(pop[z < 2.5] == 1) == 0.0   # no [O II] can be read below z = 2.55
    # their true redshift is the [O II] redshift of the same observed wavelength:
    # 1 + z_true = (1 + z) lambda_Lya / lambda_OII (REFERENCES sec. 15)
    zt = np.asarray(cat["Z_TRUE"])[pop == 1]
    ratio = rest_wavelength("Lya") / rest_wavelength("OII")
    assert np.all(np.abs((1 + zt) - (1 + z[pop == 1]) * ratio) < 0.01)  # RSD: |dz| < 0.01
    # the external file is labelled invented and sits at low redshift
    ext = Table.read(inputs.external, format="ascii.ecsv")
    assert any("INVENTED" in c for c in ext.meta["comments"]) and ext["z"].max() < 1.0


def test_depth_classes_have_their_own_selection():
    # three depth classes of similar size, and their n(z) differ (shallow falls with z, deep
    # rises): the position-dependent selection the randoms must follow
    fp = demo_fields("test")
    counts = np.bincount(fp.depth_class, minlength=3)
    assert counts.min() > 0.2 * fp.n_fields
    nz = class_selection(2e-4)
    lo, hi = nz(np.array([1.9, 1.9, 1.9]), [0, 1, 2]), nz(np.array([3.5, 3.5, 3.5]), [0, 1, 2])
    ratio = hi / lo
    assert ratio[0] < ratio[1] < ratio[2] and ratio[0] < 0.5 and ratio[2] > 1.0


def test_diagnostic_switches_leave_out_rsd_and_interlopers(tmp_path):
    # interlopers=False: targets only, the very galaxies of the full demo (the same seed
    # draws them), so paired analyses compare like with like; rsd=False: each object's
    # observed redshift is its cosmological one (no peculiar velocity)
    from corrpipe.line_demo import write_line_demo_inputs

    def catalogue(name, **switches):
        inputs = write_line_demo_inputs(tmp_path / name, seed=4, scale="test", progress=False,
                                        **switches)
        return inputs, Table.read(inputs.data)

    _, full = catalogue("full")
    only, targets = catalogue("targets", interlopers=False)
    assert only.n_interlopers == 0 and np.all(np.asarray(targets["POPULATION"]) == 0)
    for column in ("RA", "DEC", "Z", "Z_TRUE"):
        np.testing.assert_array_equal(full[np.asarray(full["POPULATION"]) == 0][column],
                                      targets[column])
    real, cat = catalogue("real", rsd=False, interlopers=False)
    np.testing.assert_allclose(cat["Z"], cat["Z_TRUE"], rtol=0, atol=1e-9)
    assert np.max(np.abs(np.asarray(targets["Z"]) - np.asarray(targets["Z_TRUE"]))) > 1e-3
    assert json.loads(real.truth_file.read_text())["target_mock"]["rsd"] is False


def test_true_selection_table_follows_the_class_densities():
    # dN/dz of a class over a redshift bin = n_k(z) x the comoving shell volume; the shell
    # from astropy's comoving distance (independent of corrpipe's integrator), to 1e-3
    # (midpoint density within the 0.005-wide bins)
    from corrpipe.line_demo import SCALES, true_selection_table

    tab = true_selection_table("demo", n_bins=320)
    true, _ = true_expansion()
    nz = class_selection(SCALES["demo"]["peak"])
    for k in range(3):
        rows = tab[np.asarray(tab["depth_class"]) == k]
        lo, hi = np.asarray(rows["z_min"]), np.asarray(rows["z_max"])
        chi = true.astropy().comoving_distance
        shell = (chi(hi).value ** 3 - chi(lo).value ** 3) * true.h**3
        expect = nz(0.5 * (lo + hi), np.full(lo.size, k)) * shell
        np.testing.assert_allclose(rows["dndz"], expect, rtol=1e-3)
