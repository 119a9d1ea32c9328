"""Jackknife regions: k-means on the sphere, HEALPix groups, sub-cubes, empty-region errors."""

import astropy.units as u
import astropy_healpix as ahp
import numpy as np
import pytest

from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.footprint import BoxFootprint, SkyBox
from corrpipe.survey.regions import (check_regions, cube_regions, healpix_regions, kmeans_regions,
                              unit_vectors)

FOOTPRINT = BoxFootprint((SkyBox(330, 40, -15, 20),))


@pytest.fixture(scope="module")
def randoms():
    return FOOTPRINT.sample(60_000, np.random.default_rng(1))


def test_kmeans_regions_cover_and_balance(randoms):
    # scipy.cluster.vq.kmeans2 reference clustering; on a uniform field k-means cells have
    # similar sizes (common practice: max/min population within a factor 2)
    ra, dec = randoms
    regions = kmeans_regions(ra, dec, 25, seed=3)
    labels = regions.assign(ra, dec)
    counts = np.bincount(labels, minlength=25)
    assert counts.min() > 0 and counts.max() / counts.min() < 2.0
    # nearest centre by angle = largest dot product (brute-force reference)
    ref = np.argmax(unit_vectors(ra[:2000], dec[:2000]) @ regions.centres.T, axis=1)
    assert np.array_equal(labels[:2000], ref)
    again = kmeans_regions(ra, dec, 25, seed=3)
    assert np.array_equal(again.centres, regions.centres)
    # regions are compact: RA spread of a region much smaller than the footprint's
    ra_c = (ra + 180) % 360
    spreads = [np.ptp(ra_c[labels == k]) for k in range(25)]
    assert np.median(spreads) < 25.0


def test_healpix_regions_balanced_groups(randoms):
    # nested HEALPix pixel order is a space-filling curve: cutting it by cumulative counts
    # gives regions of nearly equal population (common practice)
    ra, dec = randoms
    regions = healpix_regions(ra, dec, 12, nside=16)
    labels = regions.assign(ra, dec)
    counts = np.bincount(labels, minlength=12)
    assert regions.n_regions == 12 and counts.min() > 0
    pixel_pop = 60_000 / np.unique(ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, 16,
                                                         order="nested")).size
    assert np.all(np.abs(counts - 5000) < 3 * pixel_pop)
    with pytest.raises(InputError, match="no random point"):
        regions.assign([180.0], [60.0])
    with pytest.raises(ConfigError, match="power of two"):
        healpix_regions(ra, dec, 12, nside=12)


def test_cube_regions_labels():
    # common practice: sub-cube index i + n (j + n k) of floor(x / (L / n))
    pos = np.array([[1.0, 1.0, 1.0], [99.0, 1.0, 1.0], [1.0, 60.0, 1.0], [99.9, 99.9, 99.9],
                    [100.0, 0.0, 0.0]])
    labels = cube_regions(pos, 100.0, 2)
    assert labels.tolist() == [0, 1, 2, 7, 0]  # 100 wraps to 0 in a periodic box
    with pytest.raises(ConfigError):
        cube_regions(pos, 100.0, 1)


def test_empty_region_and_too_many_regions_errors(randoms):
    with pytest.raises(InputError, match=r"data: 1 empty region\(s\) \(2\)"):
        check_regions(4, data=np.array([0, 1, 3, 3]), randoms=np.arange(4))
    check_regions(2, data=np.array([0, 1]), randoms=np.array([1, 0, 1]))
    with pytest.raises(InputError, match="only 10 points"):
        kmeans_regions(randoms[0][:10], randoms[1][:10], 20, seed=1)
    with pytest.raises(ConfigError, match="n_regions"):
        kmeans_regions(*randoms, 1, seed=1)
