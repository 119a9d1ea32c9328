"""Radial selection that changes across the sky: one redshift distribution per depth class.

A depth class is a group of fields observed to a similar depth (or a single field: give each
field its own class). Two ways to know a class's selection:

* :class:`ShuffledByClass` — the redshifts (and weights) of the data in the same class,
  drawn with replacement: the "shuffled" randoms of common practice, done within each class.
* :class:`TabulatedSelection` — a table of the expected redshift distribution dN/dz of each
  class (piecewise constant in redshift bins), e.g. from the line-flux limit and the survey's
  throughput model.

:func:`class_densities` turns either into the local n(z) of each class (for FKP weights).
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from corrpipe.errors import InputError
from corrpipe.survey.readers import read_columns
from corrpipe.survey.selection_kernels import draw_from_rows
from corrpipe.survey.weights import RedshiftDensity, fkp_weights, shell_volumes, tabulated_density

__all__ = [
    "ClassDensities",
    "ShuffledByClass",
    "TabulatedSelection",
    "class_densities",
    "local_fkp_weights",
    "read_selection_table",
]


def _counts_per_class(classes: np.ndarray, n_classes: int) -> np.ndarray:
    return np.bincount(classes[classes >= 0], minlength=n_classes)


@dataclass(frozen=True, eq=False)
class ShuffledByClass:
    """Random redshifts drawn from the data of the same depth class.

    Parameters
    ----------
    z, weights : ndarray, shape (n_data,)
        Data redshifts and weights (carried to the randoms, as in global shuffling).
    classes : ndarray of int, shape (n_data,)
        Depth class of each data object (-1: outside the footprint, never drawn).
    n_classes : int
        Number of depth classes of the footprint.
    """

    z: np.ndarray
    weights: np.ndarray
    classes: np.ndarray
    n_classes: int

    def __post_init__(self):
        classes = np.asarray(self.classes, dtype=np.int64)
        order = np.argsort(classes, kind="stable")
        order = order[classes[order] >= 0]
        counts = _counts_per_class(classes, self.n_classes)
        object.__setattr__(self, "_order", order)
        object.__setattr__(self, "_counts", counts)
        object.__setattr__(self, "_starts", np.concatenate([[0], np.cumsum(counts)[:-1]]))

    def check_classes(self, used: np.ndarray) -> None:
        """Raise when a depth class that holds randoms has no data to draw redshifts from."""
        empty = np.flatnonzero((self._counts == 0) & used)
        if empty.size:
            shown = ", ".join(map(str, empty[:8])) + (" ..." if empty.size > 8 else "")
            raise InputError(f"{empty.size} depth class(es) ({shown}) have fields but no data "
                             "object, so their redshifts cannot be shuffled; merge them with a "
                             "class of similar depth in the field table's 'depth_class' column "
                             "or give a selection table (randoms.selection_file)")

    def draw(self, classes: np.ndarray, rng: np.random.Generator
             ) -> tuple[np.ndarray, np.ndarray]:
        """Redshifts and weights for randoms of the given classes."""
        counts = self._counts[classes]
        if np.any(counts == 0):
            self.check_classes(np.bincount(classes, minlength=self.n_classes) > 0)
        pick = self._starts[classes] + (rng.random(classes.size) * counts).astype(np.int64)
        idx = self._order[np.minimum(pick, self._starts[classes] + counts - 1)]
        return self.z[idx], self.weights[idx].copy()


@dataclass(frozen=True, eq=False)
class TabulatedSelection:
    """Expected redshift distribution of each depth class, piecewise constant in z.

    Parameters
    ----------
    z_edges : ndarray, shape (n_bins + 1,)
        Increasing redshift bin edges (shared by every class).
    dndz : ndarray, shape (n_classes, n_bins)
        Relative number of objects per bin for each class (any normalisation; >= 0).
    source : str
        Where the table came from (quoted in errors).
    """

    z_edges: np.ndarray
    dndz: np.ndarray
    source: str = "<selection arrays>"

    def __post_init__(self):
        edges = np.asarray(self.z_edges, dtype=np.float64)
        table = np.atleast_2d(np.asarray(self.dndz, dtype=np.float64))
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
            raise InputError(f"{self.source}: redshift bin edges must increase")
        if table.shape[1] != edges.size - 1:
            raise InputError(f"{self.source}: {table.shape[1]} values per class for "
                             f"{edges.size - 1} redshift bins")
        if np.any(~np.isfinite(table)) or np.any(table < 0):
            raise InputError(f"{self.source}: dN/dz values must be finite and >= 0")
        cdf = np.cumsum(table, axis=1)
        object.__setattr__(self, "z_edges", edges)
        object.__setattr__(self, "dndz", table)
        object.__setattr__(self, "_cdf", cdf)
        total = np.where(cdf[:, -1:] > 0, cdf[:, -1:], 1.0)
        object.__setattr__(self, "_row_cdf", np.ascontiguousarray(cdf / total))

    @property
    def n_classes(self) -> int:
        """Number of depth classes in the table."""
        return int(self.dndz.shape[0])

    def check_classes(self, used: np.ndarray) -> None:
        """Raise when a depth class that holds randoms is missing or empty in the table."""
        used = np.asarray(used, dtype=bool)
        if used.size > self.n_classes and np.any(used[self.n_classes:]):
            raise InputError(f"{self.source}: the field table has depth classes up to "
                             f"{np.flatnonzero(used).max()} but the selection table only "
                             f"0 .. {self.n_classes - 1}; add the missing classes")
        total = self._cdf[:, -1]
        empty = np.flatnonzero(used[:self.n_classes] & (total <= 0))
        if empty.size:
            raise InputError(f"{self.source}: depth class(es) {empty.tolist()[:8]} have fields "
                             "but an all-zero dN/dz")

    def restricted(self, z_min: float | None, z_max: float | None) -> TabulatedSelection:
        """The same selection cut to z_min <= z <= z_max (partial bins keep their share)."""
        lo = self.z_edges[0] if z_min is None else max(float(z_min), self.z_edges[0])
        hi = self.z_edges[-1] if z_max is None else min(float(z_max), self.z_edges[-1])
        if not hi > lo:
            raise InputError(f"{self.source}: the table covers z = {self.z_edges[0]:g} .. "
                             f"{self.z_edges[-1]:g}, outside the catalogue's redshift cut "
                             f"{z_min} .. {z_max}")
        edges = np.concatenate([[lo], self.z_edges[(self.z_edges > lo) & (self.z_edges < hi)],
                                [hi]])
        cum = np.concatenate([np.zeros((self.n_classes, 1)), self._cdf], axis=1)
        part = np.diff(np.array([np.interp(edges, self.z_edges, c) for c in cum]), axis=1)
        return TabulatedSelection(edges, part, self.source)

    def pdf(self, k: int) -> np.ndarray:
        """Probability of each redshift bin for class ``k``."""
        return self.dndz[k] / self._cdf[k, -1]

    def draw(self, classes: np.ndarray, rng: np.random.Generator
             ) -> tuple[np.ndarray, np.ndarray]:
        """Redshifts (uniform inside the drawn bin) and unit weights for the given classes."""
        self.check_classes(np.bincount(classes, minlength=self.n_classes) > 0)
        u = rng.random((2, classes.size))
        z = draw_from_rows(np.ascontiguousarray(classes, dtype=np.int64), u[0], u[1],
                           self._row_cdf, self.z_edges)
        return z, np.ones(classes.size)


def read_selection_table(path: str | os.PathLike) -> TabulatedSelection:
    """Read a selection table: columns ``depth_class``, ``z_min``, ``z_max``, ``dndz``.

    One row per (class, redshift bin); every class must use the same bins.
    """
    path = Path(path)
    where = f"selection table '{path}'"
    if not path.is_file():
        raise InputError(f"{where} does not exist; check randoms.selection_file")
    cols = read_columns(path, ["depth_class", "z_min", "z_max", "dndz"])
    cls, lo, hi, val = (cols[k] for k in ("depth_class", "z_min", "z_max", "dndz"))
    if cls.size == 0:
        raise InputError(f"{where} has no rows")
    if np.any(~np.isfinite(cls)) or np.any(cls != np.round(cls)) or np.any(cls < 0):
        raise InputError(f"{where}: column 'depth_class' must hold whole numbers >= 0")
    cls = cls.astype(np.int64)
    bins = np.unique(np.column_stack([lo, hi]), axis=0)
    edges = np.append(bins[:, 0], bins[-1, 1])
    if np.any(bins[1:, 0] != bins[:-1, 1]) or np.any(bins[:, 1] <= bins[:, 0]):
        raise InputError(f"{where}: the (z_min, z_max) bins must be contiguous and increasing")
    n_classes = int(cls.max()) + 1
    table = np.zeros((n_classes, bins.shape[0]))
    seen = np.zeros_like(table, dtype=np.int64)
    j = np.searchsorted(bins[:, 0], lo)
    np.add.at(table, (cls, j), val)
    np.add.at(seen, (cls, j), 1)
    present = np.unique(cls)
    if np.any(seen[present] != 1):
        raise InputError(f"{where}: every depth class needs exactly one row per redshift bin "
                         f"({bins.shape[0]} bins)")
    return TabulatedSelection(edges, table, source=where)


@dataclass(frozen=True)
class ClassDensities:
    """Local n(z) of every depth class on shared redshift bins.

    Attributes
    ----------
    z_edges : ndarray, shape (n_bins + 1,)
        Redshift bin edges.
    nbar : ndarray, shape (n_classes, n_bins)
        Number density of each class per bin, (h/Mpc)^3.
    weighted_counts : ndarray, shape (n_classes, n_bins)
        Sum of data weights per class and bin (the tabulated shape times the class total when
        a selection table is used).
    areas_sr : ndarray, shape (n_classes,)
        Effective area of each class, sr.
    """

    z_edges: np.ndarray
    nbar: np.ndarray
    weighted_counts: np.ndarray
    areas_sr: np.ndarray

    @property
    def n_classes(self) -> int:
        """Number of depth classes."""
        return int(self.nbar.shape[0])

    def at(self, z, classes, interpolation: str = "step") -> np.ndarray:
        """n(z) of each object's own class at its redshift, (h/Mpc)^3; 0 outside the bins
        and for class -1."""
        return tabulated_density(self.z_edges, self.nbar, z, interpolation, rows=classes)

    def to_hdf5_group(self, group) -> None:
        """Store the tables in an h5py group."""
        for name in ("z_edges", "nbar", "weighted_counts", "areas_sr"):
            group.create_dataset(name, data=getattr(self, name))

    @classmethod
    def from_hdf5_group(cls, group) -> ClassDensities:
        """Read tables written by :meth:`to_hdf5_group`."""
        return cls(*(np.asarray(group[n][()]) for n in
                     ("z_edges", "nbar", "weighted_counts", "areas_sr")))


def class_densities(z, weights, classes, class_areas_sr, z_edges, cosmology,
                    selection: TabulatedSelection | None = None) -> ClassDensities:
    """Local n(z) of each depth class, (h/Mpc)^3.

    Parameters
    ----------
    z, weights, classes : ndarray, shape (n_data,)
        Data redshifts, weights (not FKP) and depth classes (-1 outside the footprint).
    class_areas_sr : ndarray, shape (n_classes,)
        Effective (completeness-weighted) area of each class, sr.
    z_edges : ndarray
        Redshift bin edges of the n(z) tables.
    cosmology
        Fiducial cosmology.
    selection : TabulatedSelection, optional
        When given, the shape of each class's n(z) is the tabulated dN/dz (averaged onto
        ``z_edges``) scaled to the class's weighted data count; otherwise it is the class's
        own data histogram.

    Notes
    -----
    n_k(z) = N_k(z) / V_k(z), with V_k the shell volume over class k's area (the common
    practice of the global n(z), applied per class).
    """
    z = np.asarray(z, dtype=np.float64)
    w = np.ones_like(z) if weights is None else np.asarray(weights, dtype=np.float64)
    classes = np.asarray(classes, dtype=np.int64)
    areas = np.asarray(class_areas_sr, dtype=np.float64)
    edges = np.asarray(z_edges, dtype=np.float64)
    n_classes, n_bins = areas.size, edges.size - 1
    volume_per_sr = shell_volumes(edges, 1.0, cosmology)
    keep = (classes >= 0) & (classes < n_classes) & (z >= edges[0]) & (z <= edges[-1])
    j = np.clip(np.searchsorted(edges, z[keep], side="right") - 1, 0, n_bins - 1)
    counts = np.zeros((n_classes, n_bins))
    np.add.at(counts, (classes[keep], j), w[keep])
    if selection is not None:
        totals = np.bincount(classes[keep], weights=w[keep], minlength=n_classes)
        for k in range(min(n_classes, selection.n_classes)):
            if selection.dndz[k].sum() > 0:
                counts[k] = _rebin_pdf(selection.z_edges, selection.pdf(k), edges) * totals[k]
    safe = np.where(areas > 0, areas, np.inf)
    nbar = counts / (safe[:, None] * volume_per_sr[None, :])
    return ClassDensities(edges, nbar, counts, areas)


def _rebin_pdf(edges_in, prob_in, edges_out) -> np.ndarray:
    """Probability of each output bin for a piecewise-constant density on ``edges_in``."""
    cum = np.concatenate([[0.0], np.cumsum(prob_in)])
    return np.diff(np.interp(edges_out, edges_in, cum))


def local_fkp_weights(weights, z, classes, densities: ClassDensities,
                      fallback: RedshiftDensity, p0: float,
                      interpolation: str = "step") -> np.ndarray:
    """Weights times FKP weights 1/(1 + n_k(z) P0) from each object's own class n(z).

    Objects of class -1 (outside the footprint) use ``fallback`` (the global n(z)).
    """
    z = np.asarray(z, dtype=np.float64)
    classes = np.asarray(classes, dtype=np.int64)
    nbar = densities.at(z, classes, interpolation)
    outside = classes < 0
    if np.any(outside):
        nbar[outside] = fallback.at(z[outside], interpolation)
    base = np.ones_like(z) if weights is None else np.asarray(weights, dtype=np.float64)
    return base * fkp_weights(nbar, p0)
