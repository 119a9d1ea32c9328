"""Randoms in field footprints: density per field, per-class redshift distributions, local
n(z) and FKP weights, jackknife regions that keep fields whole."""

import numpy as np
import pytest
from scipy import stats

from corrpipe.cosmology import Cosmology
from corrpipe.errors import InputError
from corrpipe.survey.field_regions import field_regions
from corrpipe.survey.fields import CIRCLE, RECTANGLE, FieldFootprint
from corrpipe.survey.randoms import make_local_randoms
from corrpipe.survey.selection import (
    ShuffledByClass,
    TabulatedSelection,
    class_densities,
    local_fkp_weights,
    read_selection_table,
)
from corrpipe.survey.weights import fkp_weights, redshift_density, shell_volumes


def field_pattern(n, seed, n_classes=3, overlap=True):
    """A grid of 1-arcmin fields 2.5 arcmin apart, some doubled and shifted so they overlap."""
    rng = np.random.default_rng(seed)
    side = int(np.ceil(np.sqrt(n)))
    i, j = np.divmod(np.arange(n), side)
    ra = (358.0 + 2.5 / 60 * i) % 360.0           # across RA = 0
    dec = 1.0 + 2.5 / 60 * j
    if overlap:
        ra[1::7] = ra[0::7][: ra[1::7].size] + 0.5 / 60
        dec[1::7] = dec[0::7][: dec[1::7].size]
    shape = rng.integers(0, 2, n)
    return FieldFootprint(ra, dec, np.where(shape == 0, CIRCLE, RECTANGLE),
                          np.full(n, 1 / 60), np.full(n, 0.8 / 60), rng.uniform(0, 90, n),
                          np.full(n, 0.6 / 60), rng.uniform(0.3, 1.0, n),
                          rng.integers(0, n_classes, n), overlap_samples=50_000)


def class_table(n_classes):
    edges = np.linspace(0.9, 1.8, 19)
    centres = 0.5 * (edges[1:] + edges[:-1])
    dndz = np.array([np.exp(-0.5 * ((centres - (1.1 + 0.2 * k)) / 0.15) ** 2)
                     for k in range(n_classes)])
    return TabulatedSelection(edges, dndz)


def test_random_density_per_field_follows_area_times_completeness():
    # chi-square of the counts per field against N x owned area x completeness / total
    # (scipy.stats.chi2; Pearson's test, common practice)
    fp = field_pattern(300, 1)
    assert fp._touched.sum() > 30
    cat, fields = make_local_randoms(fp, class_table(3), 300_000, seed=5, progress=False)
    assert np.array_equal(fp.owner(cat.ra, cat.dec), fields)
    expect = fp.owned_areas_sr() * fp.completeness_values
    expect *= len(cat) / expect.sum()
    counts = np.bincount(fields, minlength=fp.n_fields)
    live = expect > 0
    chi2 = np.sum((counts[live] - expect[live]) ** 2 / expect[live])
    p = stats.chi2.sf(chi2, live.sum() - 1)
    assert p > 1e-3, (chi2, live.sum())


def test_tabulated_selection_reproduced_per_depth_class():
    # KS test of the random redshifts of each class against the table's piecewise-uniform
    # CDF (scipy.stats.kstest)
    fp = field_pattern(200, 2)
    table = class_table(3)
    cat, fields = make_local_randoms(fp, table, 60_000, seed=6, progress=False)
    classes = fp.depth_class[fields]
    for k in range(3):
        cum = np.concatenate([[0.0], np.cumsum(table.pdf(k))])

        def cdf(z, cum=cum):
            return np.interp(z, table.z_edges, cum)

        res = stats.kstest(cat.z[classes == k], cdf)
        assert res.pvalue > 1e-3, (k, res)
    # and the classes really differ: class 0 against class 2 is rejected
    assert stats.ks_2samp(cat.z[classes == 0], cat.z[classes == 2]).pvalue < 1e-10


def test_redshifts_shuffled_within_classes_follow_each_class_data():
    # two-sample KS per class between random and data redshifts (scipy.stats.ks_2samp); the
    # weights travel with the redshifts as in global shuffling (common practice)
    fp = field_pattern(150, 3, n_classes=2)
    rng = np.random.default_rng(8)
    d_cls = rng.integers(0, 2, 4000)
    d_z = np.where(d_cls == 0, rng.normal(1.2, 0.1, d_cls.size), rng.normal(1.5, 0.1, d_cls.size))
    d_w = 1 + d_z
    sel = ShuffledByClass(d_z, d_w, d_cls, 2)
    cat, fields = make_local_randoms(fp, sel, 40_000, seed=9, progress=False)
    r_cls = fp.depth_class[fields]
    for k in range(2):
        assert stats.ks_2samp(cat.z[r_cls == k], d_z[d_cls == k]).pvalue > 1e-3
    assert np.allclose(cat.weights, 1 + cat.z)


def test_shuffling_needs_data_in_every_class():
    fp = field_pattern(60, 4, n_classes=3)
    sel = ShuffledByClass(np.array([1.0, 1.1]), np.ones(2), np.array([0, 1]), 3)
    with pytest.raises(InputError, match="depth class"):
        make_local_randoms(fp, sel, 1000, seed=1, progress=False)


def test_class_densities_and_local_fkp_weights():
    # n_k = N_k / (A_k dV/dOmega) per class (the global n(z) formula per class, common
    # practice): with one class it equals the global redshift_density; FKP 1/(1 + n P0)
    # (Feldman, Kaiser & Peacock 1994)
    cosmo = Cosmology()
    rng = np.random.default_rng(11)
    z = rng.uniform(1.0, 1.5, 3000)
    w = rng.uniform(0.5, 1.5, 3000)
    edges = np.linspace(1.0, 1.5, 11)
    one = class_densities(z, w, np.zeros(3000, int), [0.01], edges, cosmo)
    ref = redshift_density(z, w, edges, 0.01, cosmo)
    assert np.allclose(one.nbar[0], ref.nbar, rtol=1e-12)
    cls = (z > 1.25).astype(int)          # class 1 only has z > 1.25
    two = class_densities(z, w, cls, [0.01, 0.002], edges, cosmo)
    vol = shell_volumes(edges, 1.0, cosmo)
    counts1, _ = np.histogram(z[cls == 1], edges, weights=w[cls == 1])
    assert np.allclose(two.nbar[1], counts1 / (0.002 * vol), rtol=1e-12)
    fkp = local_fkp_weights(w, z, cls, two, ref, 1e4)
    j = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, 9)
    assert np.allclose(fkp, w * fkp_weights(two.nbar[cls, j], 1e4), rtol=1e-12)


def test_selection_table_reader(tmp_path):
    path = tmp_path / "sel.csv"
    rows = ["depth_class,z_min,z_max,dndz"]
    for k in range(2):
        for lo, v in ((1.0, 1 + k), (1.2, 2), (1.4, 3 - k)):
            rows.append(f"{k},{lo},{lo + 0.2:.1f},{v}")
    path.write_text("\n".join(rows))
    sel = read_selection_table(path)
    assert sel.n_classes == 2
    assert np.allclose(sel.z_edges, [1.0, 1.2, 1.4, 1.6])
    assert np.allclose(sel.pdf(1), np.array([2, 2, 2]) / 6)
    path.write_text("\n".join(rows[:-1]))
    with pytest.raises(InputError, match="one row per redshift bin"):
        read_selection_table(path)


def test_jackknife_regions_never_split_a_field():
    # every field lies wholly in one region (common practice for jackknife resampling of
    # pointed surveys); regions are non-empty and of similar effective area
    fp = field_pattern(400, 12)
    regions = field_regions(fp, 12, seed=3)
    assert regions.n_regions == 12
    cat, fields = make_local_randoms(fp, class_table(3), 50_000, seed=4, progress=False)
    labels = regions.assign(cat.ra, cat.dec)
    for f in np.unique(fields):
        assert np.unique(labels[fields == f]).size == 1
    assert np.array_equal(labels, regions.of_fields(fields))
    area = np.bincount(regions.field_labels, weights=fp.owned_areas_sr()
                       * fp.completeness_values, minlength=12)
    assert area.min() > 0.3 * area.mean()
    with pytest.raises(InputError, match="outside every field"):
        regions.assign([180.0], [-60.0])


def test_class_counts_set_each_class_surface_density():
    # with class_counts, a class's share of the randoms is its share of the objects (the
    # random density must follow the galaxies' surface density, common practice); multinomial
    # chi-square over the classes (scipy.stats.chi2) and per-field counts within a class
    fp = field_pattern(240, 13)
    counts = np.array([1000.0, 3000.0, 500.0])
    cat, fields = make_local_randoms(fp, class_table(3), 90_000, class_counts=counts, seed=2,
                                     progress=False)
    got = np.bincount(fp.depth_class[fields], minlength=3)
    expect = counts / counts.sum() * len(cat)
    chi2 = np.sum((got - expect) ** 2 / expect)
    assert stats.chi2.sf(chi2, 2) > 1e-3, (got, expect)
    in_class = fp.depth_class == 1
    area = (fp.owned_areas_sr() * fp.completeness_values)[in_class]
    per_field = np.bincount(fields, minlength=fp.n_fields)[in_class]
    exp_f = area / area.sum() * per_field.sum()
    live = exp_f > 0
    chi2 = np.sum((per_field[live] - exp_f[live]) ** 2 / exp_f[live])
    assert stats.chi2.sf(chi2, live.sum() - 1) > 1e-3
