"""Jackknife region labels: k-means on the unit sphere, HEALPix pixel groups, box sub-cubes.

Regions are defined on the randoms (they trace the footprint) and then every data and random
object gets the label of its region. Labels are int64 in 0 .. n_regions - 1.
"""

from __future__ import annotations

from dataclasses import dataclass

import astropy.units as u
import astropy_healpix as ahp
import numpy as np
from scipy.cluster.vq import kmeans2
from scipy.spatial import cKDTree

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting

__all__ = [
    "SkyRegions",
    "HealpixRegions",
    "RegionSettings",
    "unit_vectors",
    "kmeans_regions",
    "healpix_regions",
    "cube_regions",
    "check_regions",
]


def unit_vectors(ra_deg, dec_deg) -> np.ndarray:
    """Unit vectors (n, 3) of directions given in degrees."""
    ra, dec = np.radians(np.asarray(ra_deg, float)), np.radians(np.asarray(dec_deg, float))
    cd = np.cos(dec)
    return np.column_stack([cd * np.cos(ra), cd * np.sin(ra), np.sin(dec)])


def _check_n_regions(n_regions: int, n_points: int, what: str) -> int:
    if not isinstance(n_regions, (int, np.integer)) or n_regions < 2:
        raise ConfigError(f"covariance.n_regions = {n_regions!r} must be an integer >= 2")
    if n_points < n_regions:
        raise InputError(f"{n_regions} jackknife regions requested but {what} has only "
                         f"{n_points} points; lower covariance.n_regions")
    return int(n_regions)


@dataclass(frozen=True, eq=False)
class SkyRegions:
    """Regions defined by centres on the unit sphere; a point belongs to its nearest centre.

    Attributes
    ----------
    centres : ndarray, shape (n_regions, 3)
        Unit vectors of the region centres.
    """

    centres: np.ndarray

    @property
    def n_regions(self) -> int:
        """Number of regions."""
        return int(self.centres.shape[0])

    def assign(self, ra_deg, dec_deg) -> np.ndarray:
        """Region label (int64) of each direction (degrees)."""
        _, idx = cKDTree(self.centres).query(unit_vectors(ra_deg, dec_deg))
        return np.asarray(idx, dtype=np.int64)


def kmeans_regions(ra_deg, dec_deg, n_regions: int, seed, n_sample: int = 200_000,
                   n_iter: int = 30) -> SkyRegions:
    """Jackknife regions from k-means clustering of (a subsample of) random directions.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        Directions of the randoms, degrees.
    n_regions : int
        Number of regions.
    seed : int or numpy.random.Generator
        Seed for the subsample and the k-means++ start.
    n_sample : int
        Largest subsample used for the clustering.
    n_iter : int
        k-means iterations.

    Notes
    -----
    Clustering uses ``scipy.cluster.vq.kmeans2`` on 3-D unit vectors: for points on a sphere
    the chord distance is monotonic in the angle, so nearest-centre assignment is angular.
    """
    rng = np.random.default_rng(seed)
    vec = unit_vectors(ra_deg, dec_deg)
    n_regions = _check_n_regions(n_regions, vec.shape[0], "the random catalogue")
    if vec.shape[0] > n_sample:
        vec = vec[rng.choice(vec.shape[0], size=n_sample, replace=False)]
    centres, labels = kmeans2(vec, n_regions, iter=n_iter, minit="++", seed=rng)
    if np.unique(labels).size < n_regions:
        raise InputError(f"k-means found only {np.unique(labels).size} of {n_regions} regions "
                         "non-empty; lower covariance.n_regions or use more randoms")
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    return SkyRegions(centres)


@dataclass(frozen=True, eq=False)
class HealpixRegions:
    """Regions made of groups of coarse HEALPix pixels (nested order).

    Attributes
    ----------
    nside : int
        Resolution of the grouping pixels.
    pixel_labels : ndarray of int64, shape (12 nside^2,)
        Region of each pixel (-1 for pixels without randoms).
    """

    nside: int
    pixel_labels: np.ndarray

    @property
    def n_regions(self) -> int:
        """Number of regions."""
        return int(self.pixel_labels.max()) + 1

    def assign(self, ra_deg, dec_deg) -> np.ndarray:
        """Region label of each direction; raises for directions in unlabelled pixels."""
        pix = ahp.lonlat_to_healpix(np.asarray(ra_deg, float) * u.deg,
                                    np.asarray(dec_deg, float) * u.deg, self.nside,
                                    order="nested")
        labels = self.pixel_labels[np.asarray(pix)]
        if np.any(labels < 0):
            raise InputError(f"{int(np.sum(labels < 0))} objects fall in HEALPix pixels "
                             f"(nside {self.nside}) that hold no random point, so they have "
                             "no jackknife region; cut the data to the random footprint")
        return labels


def healpix_regions(ra_deg, dec_deg, n_regions: int, nside: int = 16) -> HealpixRegions:
    """Group the HEALPix pixels holding randoms into ``n_regions`` compact regions.

    Pixels are taken in nested order (a space-filling curve, so consecutive pixels are
    neighbours) and cut where the cumulative random count passes k/n_regions of the total,
    giving regions with nearly equal numbers of randoms.
    """
    try:
        npix = int(ahp.nside_to_npix(int(nside)))
    except ValueError as exc:
        raise ConfigError(f"covariance.region_nside = {nside} must be a power of two") from exc
    pix = np.asarray(ahp.lonlat_to_healpix(np.asarray(ra_deg, float) * u.deg,
                                           np.asarray(dec_deg, float) * u.deg, int(nside),
                                           order="nested"))
    counts = np.bincount(pix, minlength=npix)
    occupied = np.flatnonzero(counts)
    n_regions = _check_n_regions(n_regions, occupied.size,
                                 f"the set of occupied nside-{nside} pixels")
    cum = np.cumsum(counts[occupied]) - 0.5 * counts[occupied]
    labels_occ = np.minimum((cum / counts.sum() * n_regions).astype(np.int64), n_regions - 1)
    # guarantee every label is used when pixels are few: fall back to equal pixel numbers
    if np.unique(labels_occ).size < n_regions:
        labels_occ = (np.arange(occupied.size) * n_regions) // occupied.size
    pixel_labels = np.full(npix, -1, dtype=np.int64)
    pixel_labels[occupied] = labels_occ
    return HealpixRegions(int(nside), pixel_labels)


def cube_regions(positions, box_size: float, n_per_side: int) -> np.ndarray:
    """Sub-cube labels for a periodic box: n_per_side^3 regions, label = i + n (j + n k).

    Parameters
    ----------
    positions : array_like, shape (n, 3)
        Positions in Mpc/h, inside [0, box_size).
    box_size : float
        Box side, Mpc/h.
    n_per_side : int
        Cubes along each axis.
    """
    pos = np.asarray(positions, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"cube regions need positions of shape (n, 3); got {pos.shape}")
    if not (isinstance(n_per_side, (int, np.integer)) and n_per_side >= 2):
        raise ConfigError(f"covariance.cubes_per_side = {n_per_side!r} must be an integer >= 2")
    idx = np.floor((pos % box_size) / box_size * n_per_side).astype(np.int64)
    idx = np.clip(idx, 0, n_per_side - 1)
    return idx[:, 0] + n_per_side * (idx[:, 1] + n_per_side * idx[:, 2])


def check_regions(n_regions: int, **labels) -> None:
    """Raise InputError naming every region with no object in any of the labelled catalogues.

    Examples
    --------
    >>> check_regions(2, data=np.array([0, 1]), randoms=np.array([0, 1, 1]))
    """
    problems = []
    for name, lab in labels.items():
        lab = np.asarray(lab)
        if lab.size and (lab.min() < 0 or lab.max() >= n_regions):
            raise InputError(f"{name}: region labels must lie in [0, {n_regions}); found "
                             f"[{lab.min()}, {lab.max()}]")
        counts = np.bincount(lab, minlength=n_regions)
        empty = np.flatnonzero(counts == 0)
        if empty.size:
            shown = ", ".join(map(str, empty[:10])) + (" ..." if empty.size > 10 else "")
            problems.append(f"{name}: {empty.size} empty region(s) ({shown})")
    if problems:
        raise InputError("jackknife regions with no objects: " + "; ".join(problems)
                         + ". Lower covariance.n_regions or change covariance.regions")


@dataclass(frozen=True)
class RegionSettings:
    """How jackknife regions are made (part of the ``[covariance]`` section)."""

    regions: str = setting("kmeans", "jackknife region scheme (sub-cubes for periodic boxes; "
                           "whole fields grouped for field footprints)",
                           choices=("kmeans", "healpix", "cubes", "fields"))
    n_regions: int = setting(100, "number of jackknife regions (sky schemes)", low=2)
    cubes_per_side: int = setting(4, "sub-cubes per box side (cubes scheme)", low=2)
    region_nside: int = setting(16, "HEALPix nside of the grouping pixels", low=1, high=1024)
    kmeans_sample: int = setting(200_000, "randoms used to place the k-means centres", low=100)
