"""Footprints: areas against closed forms and scipy integrals, HEALPix maps, clear errors."""

import warnings

import astropy.units as u
import astropy_healpix as ahp
import numpy as np
import pytest
from astropy.io import fits
from scipy import integrate, stats

from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.footprint import (SQ_DEG_PER_SR, BoxFootprint, FootprintMismatchWarning,
                                FootprintSettings, HealpixFootprint, SkyBox,
                                check_data_inside, footprint_from_data,
                                footprint_from_settings, outside_fraction, read_healpix_map)


def isotropic_directions(n, seed):
    """Uniform directions from normalised Gaussian 3-vectors (Muller 1959), in degrees."""
    v = np.random.default_rng(seed).standard_normal((n, 3))
    v /= np.linalg.norm(v, axis=1, keepdims=True)
    return np.degrees(np.arctan2(v[:, 1], v[:, 0])) % 360.0, np.degrees(np.arcsin(v[:, 2]))


def test_full_sphere_and_hemisphere_areas():
    # fact of geometry: the sphere is 4 pi sr = 41252.96 deg^2 (common practice)
    assert SkyBox(0, 360, -90, 90).area_sr() == pytest.approx(4 * np.pi, rel=1e-14)
    assert SkyBox(0, 360, -90, 90).area_deg2() == pytest.approx(41252.961, abs=1e-3)
    assert SkyBox(0, 360, 0, 90).area_sr() == pytest.approx(2 * np.pi, rel=1e-14)


@pytest.mark.parametrize("box", [(10, 40, -5, 25), (350, 20, 30, 60), (100, 300, -80, -60)])
def test_box_area_against_scipy_integral(box):
    # scipy.integrate.dblquad reference of ∫∫ cos(dec) dra ddec over the zone
    b = SkyBox(*box)
    width = np.radians((box[1] - box[0]) % 360)
    ref, _ = integrate.dblquad(lambda dec, ra: np.cos(dec), 0, width,
                               np.radians(box[2]), np.radians(box[3]))
    assert b.area_sr() == pytest.approx(ref, rel=1e-10)


def test_wrapping_box_contains_and_monte_carlo_area():
    # common practice: a box 350 -> 10 deg spans RA = 0; Monte Carlo area within binomial error
    b = SkyBox(350, 10, -10, 10)
    assert b.contains([355, 5, 0, 20, 340], [0, 0, 0, 0, 0]).tolist() == [True, True, True,
                                                                          False, False]
    ra, dec = isotropic_directions(400_000, 1)
    frac = b.contains(ra, dec).mean()
    sigma = np.sqrt(frac * (1 - frac) / ra.size)
    assert abs(frac * 4 * np.pi - b.area_sr()) < 4 * sigma * 4 * np.pi


def test_union_and_veto_area_is_exact():
    # inclusion–exclusion on zones (common practice): A ∪ B = A + B - A ∩ B, minus a veto inside
    a, b = SkyBox(0, 30, 0, 20), SkyBox(20, 50, 10, 30)
    overlap = SkyBox(20, 30, 10, 20)
    veto = SkyBox(5, 7, 2, 4)
    fp = BoxFootprint((a, b), (veto,))
    expect = a.area_sr() + b.area_sr() - overlap.area_sr() - veto.area_sr()
    assert fp.area_sr() == pytest.approx(expect, rel=1e-12)
    assert fp.area_deg2() == pytest.approx(expect * SQ_DEG_PER_SR, rel=1e-12)


def test_box_union_samples_are_uniform():
    # uniform density on the sphere: the overlap region gets its area fraction of the points
    # (binomial error), and sin(dec) is uniform inside a single box (scipy.stats.kstest)
    a, b = SkyBox(0, 30, 0, 20), SkyBox(20, 50, 10, 30)
    fp = BoxFootprint((a, b))
    ra, dec = fp.sample(200_000, np.random.default_rng(3))
    assert fp.contains(ra, dec).all()
    overlap = SkyBox(20, 30, 10, 20)
    p = overlap.area_sr() / fp.area_sr()
    frac = overlap.contains(ra, dec).mean()
    assert abs(frac - p) < 4 * np.sqrt(p * (1 - p) / ra.size)
    ra1, dec1 = a.sample(50_000, np.random.default_rng(4))
    lo, hi = np.sin(np.radians(0)), np.sin(np.radians(20))
    assert stats.kstest((np.sin(np.radians(dec1)) - lo) / (hi - lo), "uniform").pvalue > 1e-3


def _write_map(path, values, nside, ordering, explicit_pixels=None):
    if explicit_pixels is None:
        cols = [fits.Column(name="COMPLETENESS", format="E", array=values)]
        hdr = {"INDXSCHM": "IMPLICIT"}
    else:
        cols = [fits.Column(name="PIXEL", format="K", array=explicit_pixels),
                fits.Column(name="COMPLETENESS", format="E", array=values)]
        hdr = {"INDXSCHM": "EXPLICIT"}
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    hdu.header["NSIDE"] = nside
    hdu.header["ORDERING"] = ordering
    for k, v in hdr.items():
        hdu.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)


def _cap_map(nside, order, radius_deg=25.0):
    lon, lat = ahp.healpix_to_lonlat(np.arange(12 * nside**2), nside, order=order)
    lon, lat = lon.to_value(u.rad), lat.to_value(u.rad)
    # angular distance to (ra, dec) = (60, 30) deg
    c = (np.sin(lat) * np.sin(np.radians(30))
         + np.cos(lat) * np.cos(np.radians(30)) * np.cos(lon - np.radians(60)))
    values = np.where(c > np.cos(np.radians(radius_deg)), 0.9, 0.0)
    values[(c > np.cos(np.radians(radius_deg))) & (c < np.cos(np.radians(20)))] = 0.4
    return values


@pytest.mark.parametrize("order", ["RING", "NESTED"])
def test_healpix_map_area_is_pixel_count_times_pixel_area(tmp_path, order):
    # HEALPix pixel area = 4 pi / (12 nside^2) (Górski et al. 2005, eq. 2 [from memory])
    nside = 32
    values = _cap_map(nside, order.lower())
    path = tmp_path / "map.fits"
    _write_map(path, values, nside, order)
    fp = read_healpix_map(path)
    n_kept = int(np.sum(values > 0))
    assert fp.area_sr() == pytest.approx(n_kept * 4 * np.pi / (12 * nside**2), rel=1e-12)
    thr = read_healpix_map(path, threshold=0.5)
    assert thr.area_sr() == pytest.approx(np.sum(values >= 0.5) * 4 * np.pi / (12 * nside**2))
    weighted = read_healpix_map(path, weight_by_completeness=True)
    assert weighted.effective_area_sr() == pytest.approx(
        values.astype(np.float32).sum() * 4 * np.pi / (12 * nside**2), rel=1e-6)
    # membership agrees with astropy_healpix's own pixel lookup
    ra, dec = isotropic_directions(20_000, 5)
    pix = ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, nside, order=order.lower())
    assert np.array_equal(fp.contains(ra, dec), values[pix] > 0)


def test_ring_and_nested_maps_describe_the_same_sky(tmp_path):
    # astropy_healpix reference: the same footprint in both orderings gives the same mask
    nside = 16
    ring = _cap_map(nside, "ring")
    nested = ring[ahp.HEALPix(nside=nside, order="nested").nested_to_ring(
        np.arange(12 * nside**2))]
    fr = HealpixFootprint(ring, nside, "ring")
    fn = HealpixFootprint(nested, nside, "nested")
    ra, dec = isotropic_directions(20_000, 6)
    assert np.array_equal(fr.contains(ra, dec), fn.contains(ra, dec))
    assert fr.area_sr() == pytest.approx(fn.area_sr())


def test_explicit_partial_map(tmp_path):
    # HEALPix FITS convention (INDXSCHM = EXPLICIT): PIXEL column lists the observed pixels
    nside = 8
    pixels = np.array([3, 10, 100, 700])
    path = tmp_path / "partial.fits"
    _write_map(path, np.ones(4), nside, "NESTED", explicit_pixels=pixels)
    fp = read_healpix_map(path)
    assert np.array_equal(fp.pixels, pixels)
    assert fp.area_sr() == pytest.approx(4 * 4 * np.pi / (12 * nside**2))


def test_healpix_samples_are_uniform_inside_pixels():
    # Górski et al. (2005): equal-area pixels; children at 4x nside must get equal shares
    # (chi-square test, scipy.stats reference), so the density is uniform below pixel scale
    nside = 4
    values = np.zeros(12 * nside**2)
    kept = np.array([0, 1, 50, 95, 191])  # polar, equatorial and south-cap pixels (nested)
    values[kept] = 1.0
    fp = HealpixFootprint(values, nside, "nested")
    ra, dec = fp.sample(160_000, np.random.default_rng(7))
    assert fp.contains(ra, dec).all()
    child = ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, 4 * nside, order="nested")
    counts = np.bincount(np.asarray(child), minlength=12 * 16 * nside**2)
    used = np.concatenate([np.arange(16 * p, 16 * p + 16) for p in kept])
    assert counts[used].sum() == ra.size
    chi2 = stats.chisquare(counts[used])
    assert chi2.pvalue > 1e-3


def test_footprint_from_data_occupied_pixels():
    # common practice: the data's occupied pixels; area = count x pixel area
    ra, dec = SkyBox(0, 40, 0, 30).sample(50_000, np.random.default_rng(8))
    fp = footprint_from_data(ra, dec, nside=16)
    pix = np.unique(ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, 16, order="nested"))
    assert fp.area_sr() == pytest.approx(pix.size * 4 * np.pi / (12 * 16**2))
    assert outside_fraction(fp, ra, dec) == 0.0


def test_mismatch_warning_above_threshold():
    # common practice: warn when data fall outside the random footprint
    fp = SkyBox(0, 10, 0, 10)
    ra = np.array([5.0] * 95 + [50.0] * 5)
    dec = np.full(100, 5.0)
    with pytest.warns(FootprintMismatchWarning, match="5.00%"):
        frac = check_data_inside(fp, ra, dec, warn_above=0.01)
    assert frac == pytest.approx(0.05)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        check_data_inside(fp, ra[:95], dec[:95])


def test_footprint_from_settings_boxes_and_errors():
    s = FootprintSettings(boxes=((350.0, 10.0, -5.0, 5.0),), vetoes=((0.0, 1.0, 0.0, 1.0),))
    fp = footprint_from_settings(s)
    expect = SkyBox(350, 10, -5, 5).area_sr() - SkyBox(0, 1, 0, 1).area_sr()
    assert fp.area_sr() == pytest.approx(expect, rel=1e-12)
    with pytest.raises(ConfigError, match=r"footprint.boxes\[0\]"):
        footprint_from_settings(FootprintSettings(boxes=((0.0, 10.0, 5.0, 1.0),)))
    with pytest.raises(ConfigError, match="boxes is empty"):
        footprint_from_settings(FootprintSettings())
    with pytest.raises(ConfigError, match="from_data"):
        footprint_from_settings(FootprintSettings(kind="from_data"))


def test_bad_map_files_give_clear_errors(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        read_healpix_map(tmp_path / "missing.fits")
    corrupt = tmp_path / "corrupt.fits"
    corrupt.write_bytes(b"this is not a FITS file at all" * 10)
    with pytest.raises(InputError, match="could not be read"):
        read_healpix_map(corrupt)
    bad_nside = tmp_path / "nside3.fits"
    _write_map(bad_nside, np.ones(12 * 9), 3, "RING")
    with pytest.raises(InputError, match="power of two"):
        read_healpix_map(bad_nside)
    short = tmp_path / "short.fits"
    _write_map(short, np.ones(100), 8, "RING")
    with pytest.raises(InputError, match="needs 12 nside"):
        read_healpix_map(short)
    bad_order = tmp_path / "order.fits"
    _write_map(bad_order, np.ones(12 * 4), 2, "SPIRAL")
    with pytest.raises(InputError, match="ordering"):
        read_healpix_map(bad_order)
    empty = tmp_path / "empty.fits"
    _write_map(empty, np.full(12 * 4, 0.3), 2, "RING")
    with pytest.raises(InputError, match="footprint is empty"):
        read_healpix_map(empty, threshold=0.5)


def test_healpix_map_with_veto_boxes(tmp_path):
    # full-sky map minus a veto zone: area = 4 pi - zone area (zone formula, common practice),
    # up to the Monte Carlo error of the kept fraction (2e6 samples)
    path = tmp_path / "full.fits"
    _write_map(path, np.ones(12 * 8**2), 8, "RING")
    veto = SkyBox(20, 80, -30, 10)
    s = FootprintSettings(kind="healpix", healpix_file=str(path),
                          vetoes=((20.0, 80.0, -30.0, 10.0),))
    fp = footprint_from_settings(s)
    p = veto.area_sr() / (4 * np.pi)
    sigma = 4 * np.pi * np.sqrt(p * (1 - p) / 2e6)
    assert abs(fp.area_sr() - (4 * np.pi - veto.area_sr())) < 4 * sigma
    ra, dec = fp.sample(10_000, np.random.default_rng(2))
    assert not veto.contains(ra, dec).any()


def test_settings_validate_boxes_on_load():
    from pathlib import Path

    from corrpipe.config import validate_section

    with pytest.raises(ConfigError, match=r"vetoes\[0\]"):
        validate_section(FootprintSettings, {"vetoes": [[0, 400, 0, 1]]}, "footprint",
                         "run.toml", Path("."))


def test_map_stored_in_1024_value_rows(tmp_path):
    # HEALPix FITS convention: implicit maps are often stored as rows of 1024 values (TFORM
    # '1024E'); they are read in row-major order
    nside = 16
    values = _cap_map(nside, "ring")
    col = fits.Column(name="T", format="1024E", array=values.reshape(-1, 1024))
    hdu = fits.BinTableHDU.from_columns([col])
    hdu.header["NSIDE"], hdu.header["ORDERING"] = nside, "RING"
    path = tmp_path / "rows.fits"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    fp = read_healpix_map(path, "T")
    assert np.array_equal(fp.values > 0, values > 0)
    with pytest.raises(InputError, match="no column 'Q'"):
        read_healpix_map(path, "Q")
