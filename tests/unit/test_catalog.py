"""Catalogue loading: formats, column mapping, cuts, weights, wrapping and bad-input errors.

References: positions are checked against astropy (astropy.cosmology comoving distance and
astropy.coordinates.spherical_to_cartesian, reference library); the digest against hashlib's
one-shot sha256 (Python standard library reference). The data are small invented arrays; the
error cases follow the input rules of the project issue (common practice for survey inputs).
"""

import hashlib
import logging
from pathlib import Path

import h5py
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import spherical_to_cartesian
from astropy.table import Table

from corrpipe.survey.catalog import (
    Catalogue,
    CatalogueSettings,
    box_catalogue,
    detect_format,
    file_digest,
    load_box_catalogue,
    load_catalogue,
    load_sky_catalogue,
    read_columns,
    sky_catalogue,
)
from corrpipe.config import validate_section
from corrpipe.cosmology import preset
from corrpipe.errors import ConfigError, InputError

COSMO = preset("planck2018")
N = 200


def _sky_table(seed=3):
    rng = np.random.default_rng(seed)
    return Table({
        "RA": rng.uniform(100.0, 140.0, N),
        "DEC": rng.uniform(-5.0, 25.0, N),
        "Z": rng.uniform(0.2, 0.9, N),
        "WEIGHT_SYS": rng.uniform(0.8, 1.2, N),
        "WEIGHT_CP": rng.integers(1, 3, N).astype(float),
    })


def _write(table, folder: Path, fmt: str) -> Path:
    if fmt == "fits":
        path = folder / "cat.fits"
        table.write(path)
    elif fmt == "hdf5":
        path = folder / "cat.hdf5"
        table.write(path, path="galaxies", serialize_meta=True)
    elif fmt == "h5-columns":
        path = folder / "cat_cols.h5"
        with h5py.File(path, "w") as f:
            for name in table.colnames:
                f[name] = np.asarray(table[name])
    elif fmt == "ecsv":
        path = folder / "cat.ecsv"
        table.write(path)
    elif fmt == "csv":
        path = folder / "cat.csv"
        table.write(path, format="ascii.csv")
    elif fmt == "parquet":
        path = folder / "cat.parquet"
        table.write(path)
    else:
        raise ValueError(fmt)
    return path


@pytest.mark.parametrize("fmt", ["fits", "hdf5", "h5-columns", "ecsv", "csv", "parquet"])
def test_every_format_gives_the_same_catalogue(tmp_path, fmt):
    # astropy reference: chi(z) from astropy.cosmology, axes from spherical_to_cartesian
    table = _sky_table()
    path = _write(table, tmp_path, fmt)
    cat = load_sky_catalogue(path, weight_columns=("WEIGHT_SYS", "WEIGHT_CP"), cosmology=COSMO,
                             name="test")
    assert len(cat) == N and not cat.is_box
    chi = COSMO.astropy().comoving_distance(np.asarray(table["Z"])).value * COSMO.h
    x, y, z = spherical_to_cartesian(chi, np.asarray(table["DEC"]) * u.deg,
                                     np.asarray(table["RA"]) * u.deg)
    expect = np.column_stack([np.asarray(x), np.asarray(y), np.asarray(z)])
    np.testing.assert_allclose(cat.positions, expect, rtol=1e-7)
    np.testing.assert_allclose(cat.weights, table["WEIGHT_SYS"] * table["WEIGHT_CP"],
                               rtol=1e-15)
    assert cat.meta["digest"] == hashlib.sha256(path.read_bytes()).hexdigest()


def test_column_mapping_and_case_insensitive_match(tmp_path):
    # common practice: survey files use varied capitalisation
    table = _sky_table()
    table.rename_column("RA", "ra_deg")
    table.rename_column("Z", "z_spec")
    path = _write(table, tmp_path, "fits")
    cat = load_sky_catalogue(path, columns={"ra": "RA_DEG", "z": "z_spec", "dec": "dec"},
                             cosmology=COSMO)
    np.testing.assert_array_equal(cat.weights, np.ones(N))
    np.testing.assert_allclose(cat.z, table["z_spec"])


def test_redshift_cut_counts_and_logs(tmp_path, caplog):
    # common practice: half-open redshift bins [z_min, z_max)
    table = _sky_table()
    table["Z"][:3] = [0.5, 0.6, 0.4]
    path = _write(table, tmp_path, "ecsv")
    z = np.asarray(table["Z"])
    expected = int(np.count_nonzero((z >= 0.5) & (z < 0.6)))
    with caplog.at_level(logging.INFO, logger="corrpipe.survey.catalog"):
        cat = load_sky_catalogue(path, z_min=0.5, z_max=0.6, cosmology=COSMO)
    assert len(cat) == expected and np.all((cat.z >= 0.5) & (cat.z < 0.6))
    assert 0.5 in cat.z and 0.6 not in cat.z
    assert f"removed {N - expected} of {N} rows" in caplog.text
    assert cat.meta["rows_read"] == N and cat.meta["rows_kept"] == expected


def test_ra_wraps_into_0_360():
    # common practice: RA is periodic with period 360 degrees
    cat = sky_catalogue([-10.0, 370.0, 359.999, -1e-17], [0.0, 0.0, 10.0, 0.0],
                        [0.5, 0.5, 0.5, 0.5], cosmology=COSMO)
    np.testing.assert_allclose(cat.ra[:3], [350.0, 10.0, 359.999], atol=1e-12)
    assert np.all((cat.ra >= 0.0) & (cat.ra < 360.0))


def _bad_file(tmp_path, column, rows, value, fmt="fits"):
    table = _sky_table()
    table[column][rows] = value
    return _write(table, tmp_path, fmt)


@pytest.mark.parametrize(
    "column, value, words",
    [
        ("RA", np.nan, "NaN, infinite or empty"),
        ("Z", np.inf, "NaN, infinite or empty"),
        ("DEC", 95.0, "declination outside [-90, 90]"),
        ("DEC", -90.5, "declination outside [-90, 90]"),
        ("Z", 0.0, "redshift <= 0"),
        ("Z", -1.0, "redshift <= 0"),
        ("WEIGHT_SYS", -0.5, "negative weights"),
        ("WEIGHT_CP", np.nan, "NaN, infinite or empty"),
    ],
)
def test_bad_values_name_file_column_count_rows(tmp_path, column, value, words):
    # input rules of the issue (common practice): error, not silent dropping
    path = _bad_file(tmp_path, column, [4, 17, 150], value)
    with pytest.raises(InputError) as info:
        load_sky_catalogue(path, weight_columns=("WEIGHT_SYS", "WEIGHT_CP"), cosmology=COSMO)
    msg = str(info.value)
    assert str(path) in msg and f"'{column}'" in msg and words in msg
    assert f"has 3 of {N} rows" in msg and "4, 17, 150" in msg


def test_empty_csv_cell_is_reported_as_missing(tmp_path):
    # astropy ascii reference behaviour: empty cells are masked -> reported as empty
    path = tmp_path / "gaps.csv"
    path.write_text("RA,DEC,Z\n10,0,0.5\n11,,0.6\n12,1,0.7\n")
    with pytest.raises(InputError, match=r"'DEC' has 1 of 3 rows .*first rows, counted from 0: 1"):
        load_sky_catalogue(path, cosmology=COSMO)


def test_empty_after_cut(tmp_path):
    # common practice: a cut that keeps nothing is a configuration mistake
    path = _write(_sky_table(), tmp_path, "fits")
    with pytest.raises(InputError, match="no objects left after the redshift cut 1.5 <= z < 2"):
        load_sky_catalogue(path, z_min=1.5, z_max=2.0, cosmology=COSMO)


def test_missing_column_lists_available(tmp_path):
    # common practice: say which columns the file has
    path = _write(_sky_table(), tmp_path, "parquet")
    with pytest.raises(InputError) as info:
        load_sky_catalogue(path, weight_columns=("WEIGHT_FKP",), cosmology=COSMO)
    msg = str(info.value)
    assert "['WEIGHT_FKP'] not found" in msg and "'WEIGHT_SYS'" in msg and "'RA'" in msg


def test_mismatched_lengths(tmp_path):
    # plain HDF5 column layout can hold columns of different length (common practice: reject)
    path = tmp_path / "ragged.h5"
    with h5py.File(path, "w") as f:
        f["RA"] = np.zeros(5)
        f["DEC"] = np.zeros(5)
        f["Z"] = np.full(4, 0.5)
    with pytest.raises(InputError, match="different lengths"):
        load_sky_catalogue(path, cosmology=COSMO)


def test_unreadable_inputs(tmp_path):
    # common practice: clear errors for wrong paths, suffixes, contents
    with pytest.raises(InputError, match="not found"):
        load_sky_catalogue(tmp_path / "nope.fits", cosmology=COSMO)
    odd = tmp_path / "cat.txt"
    odd.write_text("x")
    with pytest.raises(InputError, match="cannot tell the file format"):
        read_columns(odd, ["RA"])
    broken = tmp_path / "broken.fits"
    broken.write_bytes(b"not a fits file at all")
    with pytest.raises(InputError, match="cannot read as FITS"):
        read_columns(broken, ["RA"])
    text = Table({"RA": [1.0], "DEC": [0.0], "Z": ["high"]})
    path = _write(text, tmp_path, "ecsv")
    with pytest.raises(InputError, match="'Z' holds .* not numbers"):
        load_sky_catalogue(path, cosmology=COSMO)
    assert detect_format("a/b/cat.fits.gz") == "fits"


def test_box_catalogue_wraps_and_rejects(tmp_path):
    # common practice: periodic boxes live in [0, L); small excursions wrap
    table = Table({"px": [-1.0, 1001.0, 500.0, 999.9], "py": [0.0, 10.0, 20.0, 30.0],
                   "pz": [5.0, 5.0, 5.0, 1000.0], "w": [1.0, 2.0, 0.5, 1.0]})
    path = _write(table, tmp_path, "hdf5")
    cat = load_box_catalogue(path, columns={"x": "px", "y": "py", "z": "pz"},
                             weight_columns=("w",), box_size=1000.0, los_axis="y")
    np.testing.assert_allclose(cat.positions[:, 0], [999.0, 1.0, 500.0, 999.9], atol=1e-9)
    assert cat.positions[3, 2] == 0.0
    assert cat.is_box and cat.los_axis == 1 and cat.box_size == 1000.0
    np.testing.assert_array_equal(cat.weights, [1.0, 2.0, 0.5, 1.0])
    with pytest.raises(InputError, match=r"'px' has 2 of 3 rows outside \[0, 1000\)"):
        box_catalogue([-600.0, 10.0, 1200.0], [1, 2, 3], [1, 2, 3], box_size=1000.0,
                      names={"x": "px"})
    with pytest.raises(ConfigError, match="los_axis"):
        box_catalogue([1.0], [1.0], [1.0], box_size=10.0, los_axis="w")


def test_catalogue_type_checks_shapes():
    # common practice: one weight per position
    with pytest.raises(InputError, match="weights must have shape"):
        Catalogue(positions=np.zeros((3, 3)), weights=np.ones(2))
    cat = Catalogue(positions=np.zeros((3, 3)), weights=np.ones(3))
    sub = cat.select(np.array([True, False, True]))
    assert len(sub) == 2 and sub.sum_weights == 2.0
    with pytest.raises(InputError, match="negative"):
        cat.with_weights(np.array([1.0, -1.0, 1.0]))


def test_settings_table_and_load(tmp_path):
    # config validation through the project's loader (corrpipe.config.validate_section)
    path = _write(_sky_table(), tmp_path, "fits")
    s = validate_section(CatalogueSettings, {"path": path.name, "z_min": 0.3, "z_max": 0.7,
                                             "weight_columns": ["WEIGHT_SYS"]},
                         "catalogue", str(tmp_path / "run.toml"), tmp_path)
    cat = load_catalogue(s, COSMO)
    z = np.asarray(_sky_table()["Z"])
    assert len(cat) == np.count_nonzero((z >= 0.3) & (z < 0.7))
    with pytest.raises(ConfigError, match="needs box_size"):
        validate_section(CatalogueSettings, {"path": "a.fits", "kind": "box"}, "catalogue",
                         "run.toml", tmp_path)
    with pytest.raises(ConfigError, match="must be larger than z_min"):
        validate_section(CatalogueSettings, {"path": "a.fits", "z_min": 0.5, "z_max": 0.4},
                         "catalogue", "run.toml", tmp_path)


def test_file_digest_streams(tmp_path):
    # hashlib one-shot sha256 reference
    data = np.random.default_rng(0).bytes(3 * 1024 + 17)
    path = tmp_path / "blob.bin"
    path.write_bytes(data)
    assert file_digest(path, chunk_bytes=1000) == hashlib.sha256(data).hexdigest()


def test_parquet_nulls_and_hdf5_table_paths(tmp_path):
    # pyarrow reference writer: null cells must be reported, not read as numbers
    import pyarrow as pa
    from pyarrow import parquet

    path = tmp_path / "nulls.parquet"
    parquet.write_table(pa.table({"RA": [1.0, 2.0, 3.0], "DEC": [0.0, 1.0, 2.0],
                                  "Z": pa.array([0.5, None, 0.7])}), path)
    with pytest.raises(InputError, match=r"'Z' has 1 of 3 rows that are NaN, infinite or empty"):
        load_sky_catalogue(path, cosmology=COSMO)
    # HDF5 file with two astropy tables: the path must be given, and a wrong one is named
    h5 = tmp_path / "two.h5"
    _sky_table(1).write(h5, path="north")
    _sky_table(2).write(h5, path="south", append=True)
    south = load_sky_catalogue(h5, table="south", cosmology=COSMO)
    np.testing.assert_allclose(south.z, _sky_table(2)["Z"])
    with pytest.raises(InputError, match="several tables"):
        load_sky_catalogue(h5, cosmology=COSMO)
    with pytest.raises(InputError, match="HDF5 path 'east' not found"):
        load_sky_catalogue(h5, table="east", cosmology=COSMO)
