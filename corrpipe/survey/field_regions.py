"""Jackknife regions for field footprints: whole fields grouped, never a field split.

Removing a region must remove whole fields, or a field's data and randoms would straddle two
regions and the jackknife samples would not be the survey minus a piece of sky (common
practice). Fields are grouped by k-means on the sphere, with the centres placed on an
area-weighted sample of field centres so that regions hold similar effective areas.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.cluster.vq import kmeans2
from scipy.spatial import cKDTree

from corrpipe.errors import ConfigError, InputError

__all__ = ["FieldRegions", "field_regions"]


@dataclass(frozen=True, eq=False)
class FieldRegions:
    """Jackknife region of every field.

    Attributes
    ----------
    footprint : corrpipe.survey.fields.FieldFootprint
        The fields.
    field_labels : ndarray of int64, shape (n_fields,)
        Region of each field.
    """

    footprint: object
    field_labels: np.ndarray

    @property
    def n_regions(self) -> int:
        """Number of regions."""
        return int(self.field_labels.max()) + 1

    def of_fields(self, fields) -> np.ndarray:
        """Region labels of objects whose owning field is known."""
        return self.field_labels[np.asarray(fields, dtype=np.int64)]

    def assign(self, ra_deg, dec_deg) -> np.ndarray:
        """Region label of each direction; raises for directions outside every field."""
        own = self.footprint.owner(ra_deg, dec_deg)
        if np.any(own < 0):
            raise InputError(f"{int(np.sum(own < 0))} objects lie outside every field, so they "
                             "have no jackknife region; cut the data to the field footprint")
        return self.field_labels[own]


def field_regions(footprint, n_regions: int, seed, n_sample: int = 200_000,
                  n_iter: int = 30) -> FieldRegions:
    """Group the fields of ``footprint`` into ``n_regions`` compact jackknife regions.

    Parameters
    ----------
    footprint : corrpipe.survey.fields.FieldFootprint
        The fields.
    n_regions : int
        Number of regions (at most the number of fields with non-zero area).
    seed : int or numpy.random.Generator
        Seed of the area-weighted sample and the k-means++ start.
    n_sample : int
        Field centres drawn (with replacement, weights area x completeness) to place the
        k-means centres.
    n_iter : int
        k-means iterations.
    """
    if not isinstance(n_regions, (int, np.integer)) or n_regions < 2:
        raise ConfigError(f"covariance.n_regions = {n_regions!r} must be an integer >= 2")
    weight = footprint.owned_areas_sr() * footprint.completeness_values
    live = np.flatnonzero(weight > 0)
    if live.size < n_regions:
        raise InputError(f"{n_regions} jackknife regions requested but the footprint has only "
                         f"{live.size} fields with area; lower covariance.n_regions")
    rng = np.random.default_rng(seed)
    centres = footprint._geometry["centre"]
    pick = rng.choice(live, size=min(n_sample, max(20 * n_regions, live.size)),
                      p=weight[live] / weight[live].sum())
    for _ in range(5):
        means, _ = kmeans2(centres[pick], int(n_regions), iter=n_iter, minit="++", seed=rng)
        means /= np.linalg.norm(means, axis=1, keepdims=True)
        labels = cKDTree(means).query(centres)[1].astype(np.int64)
        if np.unique(labels[live]).size == n_regions:
            break
    else:
        raise InputError(f"could not make {n_regions} non-empty jackknife regions from "
                         f"{live.size} fields; lower covariance.n_regions")
    # relabel so region numbers are consecutive and ordered by first field
    _, labels = np.unique(labels, return_inverse=True)
    return FieldRegions(footprint, labels.astype(np.int64))
