"""The randoms stage on a field footprint with depth classes: a tiny run through the
estimate stage, local redshift selection, local FKP weights, whole-field jackknife regions,
and the config checks.

Invented test data: a pattern of 300 square and circular pointings of a made-up emission-line
survey, with three depth classes whose redshift ranges differ.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from astropy.table import Table
from scipy import stats

from corrpipe import api
from corrpipe.errors import ConfigError
from corrpipe.survey.field_table import read_field_table
from corrpipe.survey.fields import CIRCLE, RECTANGLE

CONFIG = """
[run]
output = "out"
seed = 5

[catalogue]
path = "galaxies.fits"
z_min = 0.8
z_max = 1.4

[footprint]
kind = "fields"
fields_file = "fields.ecsv"
field_size_unit = "arcmin"
field_vetoes_file = "holes.csv"

[randoms]
size_factor = 5
redshifts = "{redshifts}"
{selection}

[weights]
nz_bin_width = 0.05

[counts]
s_max = 60.0
n_s = 6
n_mu = 5

[covariance]
regions = "fields"
n_regions = 8
kmeans_sample = 5000

[fit]
s_min = 20.0
s_max = 60.0

[report]
plots = false
"""

Z_RANGES = [(0.8, 1.0), (0.9, 1.2), (1.0, 1.4)]


def _write_inputs(folder, redshifts="shuffle_by_class", selection=""):
    rng = np.random.default_rng(21)
    n = 300
    i, j = np.divmod(np.arange(n), 20)
    ra = (359.0 + 0.15 * i) % 360.0
    dec = -2.0 + 0.15 * j
    shape = np.where(rng.random(n) < 0.5, "square", "circle")
    fields = Table(dict(ra=ra, dec=dec, shape=shape, side=np.full(n, 6.0),
                        radius=np.full(n, 3.5), position_angle=rng.uniform(0, 90, n),
                        completeness=rng.uniform(0.6, 1.0, n),
                        depth_class=rng.integers(0, 3, n)))
    fields.write(folder / "fields.ecsv", overwrite=True)
    (folder / "holes.csv").write_text("ra,dec,radius\n" + f"{ra[5]},{dec[5]},1.0\n")
    holes = read_field_table(folder / "holes.csv", size_unit="arcmin")
    fp = read_field_table(folder / "fields.ecsv", size_unit="arcmin", vetoes=holes)
    g_ra, g_dec, owner = fp.sample_fields(4000, rng)
    cls = fp.depth_class[owner]
    lo = np.array([r[0] for r in Z_RANGES])[cls]
    hi = np.array([r[1] for r in Z_RANGES])[cls]
    z = np.cbrt(rng.uniform(lo**3, hi**3))
    Table(dict(RA=g_ra, DEC=g_dec, Z=z)).write(folder / "galaxies.fits", overwrite=True)
    cfg = folder / "run.toml"
    cfg.write_text(CONFIG.format(redshifts=redshifts, selection=selection))
    return cfg


def test_field_footprint_run_with_local_selection(tmp_path):
    cfg = _write_inputs(tmp_path)
    outcome = api.run(cfg, progress=False, until="estimate")
    assert [s for s, o in outcome["main"].items() if o == "ran"] == ["load", "randoms",
                                                                      "counts", "estimate"]
    with h5py.File(tmp_path / "out" / "randoms.h5") as h5:
        r_z, r_cls = h5["randoms/z"][()], h5["randoms/depth_class"][()]
        r_field, r_reg = h5["randoms/field"][()], h5["randoms/regions"][()]
        r_w = h5["randoms/weights"][()]
        d_cls, d_w = h5["data/depth_class"][()], h5["data/weights"][()]
        nbar = h5["nz_classes/nbar"][()]
        edges = h5["nz_classes/z_edges"][()]
        assert h5.attrs["n_fields"] == 300 and h5.attrs["n_depth_classes"] == 3
    data = Table.read(tmp_path / "galaxies.fits")
    # redshifts follow each class (two-sample KS, scipy.stats.ks_2samp)
    for k, (lo, hi) in enumerate(Z_RANGES):
        assert r_z[r_cls == k].min() >= lo and r_z[r_cls == k].max() <= hi
        assert stats.ks_2samp(r_z[r_cls == k], data["Z"][d_cls == k]).pvalue > 1e-3
    # FKP weights 1/(1 + n_k(z) P0) with the class's own n(z) (Feldman, Kaiser & Peacock 1994)
    j = np.clip(np.searchsorted(edges, data["Z"], side="right") - 1, 0, edges.size - 2)
    assert np.allclose(d_w, 1.0 / (1.0 + nbar[d_cls, j] * 1e4), rtol=1e-12)
    # regions never split a field
    for f in np.unique(r_field)[:50]:
        assert np.unique(r_reg[r_field == f]).size == 1
    # the random weights are the shuffled data weights (1) times FKP
    jr = np.clip(np.searchsorted(edges, r_z, side="right") - 1, 0, edges.size - 2)
    assert np.allclose(r_w, 1.0 / (1.0 + nbar[r_cls, jr] * 1e4), rtol=1e-12)
    with h5py.File(tmp_path / "out" / "estimate.h5") as h5:
        assert np.all(np.isfinite(h5["estimate/multipoles"][()]))


def test_selection_table_run_and_changes_rerun(tmp_path):
    cfg = _write_inputs(tmp_path, "table", 'selection_file = "sel.csv"')
    rows = ["depth_class,z_min,z_max,dndz"]
    for k, (lo, hi) in enumerate(Z_RANGES):
        for b in np.arange(0.8, 1.4, 0.1):
            inside = lo - 1e-9 <= b and b + 0.1 <= hi + 1e-9
            rows.append(f"{k},{b:.1f},{b + 0.1:.1f},{1.0 if inside else 0.0}")
    (tmp_path / "sel.csv").write_text("\n".join(rows))
    api.run(cfg, progress=False, until="randoms")
    with h5py.File(tmp_path / "out" / "randoms.h5") as h5:
        r_z, r_cls = h5["randoms/z"][()], h5["randoms/depth_class"][()]
    for k, (lo, hi) in enumerate(Z_RANGES):
        # the table is flat in z within the class range: KS against a uniform (scipy.stats)
        assert stats.kstest(r_z[r_cls == k], "uniform", args=(lo, hi - lo)).pvalue > 1e-3
    # editing the selection table makes the randoms stage stale (input-file fingerprint)
    (tmp_path / "sel.csv").write_text("\n".join(rows).replace(",1.0\n", ",2.0\n", 1))
    assert "randoms      stale" in api.status_text(cfg)


@pytest.mark.parametrize("edit, words", [
    (("kind = \"fields\"", "kind = \"boxes\"\nboxes = [[0.0, 10.0, 0.0, 10.0]]"),
     "needs depth classes"),
    (("redshifts = \"shuffle_by_class\"", "redshifts = \"table\""), "selection_file"),
    (("fields_file = \"fields.ecsv\"", "fields_file = \"\""), "fields_file"),
])
def test_field_config_checks(tmp_path, edit, words):
    cfg = _write_inputs(tmp_path)
    cfg.write_text(cfg.read_text().replace(*edit))
    with pytest.raises(ConfigError, match=words):
        api.check(cfg)


def test_field_shape_codes_are_the_table_words(tmp_path):
    _write_inputs(tmp_path)
    fp = read_field_table(tmp_path / "fields.ecsv")
    words = Table.read(tmp_path / "fields.ecsv")["shape"]
    assert np.array_equal(fp.shape, np.where(words == "circle", CIRCLE, RECTANGLE))


def test_mock_covariance_weights_mocks_with_their_class_n_of_z(tmp_path):
    # A mock identical to the data must give exactly the data's multipoles: the mocks get the
    # same FKP weighting as the data, here 1/(1 + n_k(z) P0) with each object's depth class
    # (Feldman, Kaiser & Peacock 1994), not the global n(z).
    import shutil

    cfg = _write_inputs(tmp_path)
    shutil.copy(tmp_path / "galaxies.fits", tmp_path / "mock_a.fits")
    data = Table.read(tmp_path / "galaxies.fits")
    keep = np.random.default_rng(4).random(len(data)) < 0.8
    data[keep].write(tmp_path / "mock_b.fits", overwrite=True)
    text = cfg.read_text().replace('regions = "fields"', 'kind = "mocks"\nmocks = ["mock_*.fits"]')
    cfg.write_text(text.replace("[weights]\n", "[weights]\nfkp = true\n"))
    api.run(cfg, progress=False, until="covariance")
    with h5py.File(tmp_path / "out" / "estimate.h5") as h5:
        data_vector = np.asarray(h5["estimate/multipoles"][()]).ravel()
    with h5py.File(tmp_path / "out" / "covariance.h5") as h5:
        samples = h5["samples"][()]
    assert samples.shape[0] == 2
    assert np.allclose(samples[0], data_vector, rtol=1e-10, atol=1e-12)
    assert not np.allclose(samples[1], data_vector, rtol=1e-3)
