"""Radial selection n(z) in (h/Mpc)^3 and FKP weights.

n(z) is the weighted redshift histogram of the data divided by the comoving volume of each
redshift shell over the footprint area, computed with the fiducial cosmology. FKP weights
1/(1 + n(z) P0) (Feldman, Kaiser & Peacock 1994) are combined with the catalogue's own weights.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting

__all__ = [
    "RedshiftDensity",
    "WeightsSettings",
    "shell_volumes",
    "redshift_density",
    "fkp_weights",
    "combine_fkp",
    "redshift_edges",
    "tabulated_density",
]

_GAUSS_NODES, _GAUSS_WEIGHTS = np.polynomial.legendre.leggauss(12)


def shell_volumes(z_edges, area_sr: float, cosmology) -> np.ndarray:
    """Comoving volume of each redshift shell over a sky area, in (Mpc/h)^3.

    Parameters
    ----------
    z_edges : array_like, shape (n_bins + 1,)
        Increasing redshift edges.
    area_sr : float
        Sky area in steradians.
    cosmology : corrpipe.cosmology.Cosmology
        Anything with ``transverse_distance(z)`` and ``hubble_distance(z)`` in Mpc/h.

    Notes
    -----
    dV = Ω D_M(z)^2 D_H(z) dz (Hogg 1999, eq. 28), integrated over each shell with 12-point
    Gauss–Legendre quadrature; valid for curved models too.
    """
    edges = np.asarray(z_edges, dtype=np.float64)
    lo, hi = edges[:-1, None], edges[1:, None]
    z = 0.5 * (lo + hi) + 0.5 * (hi - lo) * _GAUSS_NODES[None, :]
    dm = np.asarray(cosmology.transverse_distance(z.ravel())).reshape(z.shape)
    dh = np.asarray(cosmology.hubble_distance(z.ravel())).reshape(z.shape)
    return area_sr * 0.5 * (hi - lo)[:, 0] * np.sum(_GAUSS_WEIGHTS * dm**2 * dh, axis=1)


def redshift_edges(z, bin_width: float, z_min: float | None = None,
                   z_max: float | None = None) -> np.ndarray:
    """Equal-width redshift edges of ``bin_width`` covering [z_min, z_max] (data range default)."""
    z = np.asarray(z, dtype=np.float64)
    lo = float(np.min(z)) if z_min is None else float(z_min)
    hi = float(np.max(z)) if z_max is None else float(z_max)
    if not bin_width > 0:
        raise ConfigError(f"weights.nz_bin_width = {bin_width} must be > 0")
    n = max(1, int(np.ceil((hi - lo) / bin_width - 1e-9)))
    return lo + bin_width * np.arange(n + 1)


@dataclass(frozen=True)
class RedshiftDensity:
    """Tabulated mean comoving number density n(z).

    Attributes
    ----------
    z_edges : ndarray, shape (n_bins + 1,)
        Redshift bin edges.
    nbar : ndarray, shape (n_bins,)
        Weighted number density in each bin, (h/Mpc)^3.
    weighted_counts : ndarray, shape (n_bins,)
        Sum of weights per bin.
    raw_counts : ndarray of int64, shape (n_bins,)
        Objects per bin.
    volumes : ndarray, shape (n_bins,)
        Shell volumes, (Mpc/h)^3.
    area_sr : float
        Effective sky area used, steradians.
    """

    z_edges: np.ndarray
    nbar: np.ndarray
    weighted_counts: np.ndarray
    raw_counts: np.ndarray
    volumes: np.ndarray
    area_sr: float

    @property
    def z_centres(self) -> np.ndarray:
        """Bin centres."""
        return 0.5 * (self.z_edges[1:] + self.z_edges[:-1])

    def poisson_error(self) -> np.ndarray:
        """Poisson error of ``nbar`` per bin, (h/Mpc)^3 (sqrt of raw counts, weight-scaled)."""
        raw = np.maximum(self.raw_counts, 1)
        return self.nbar / np.sqrt(raw) * (self.raw_counts > 0)

    def at(self, z, interpolation: str = "step") -> np.ndarray:
        """n(z) at redshifts ``z`` in (h/Mpc)^3; 0 outside the tabulated range.

        ``interpolation`` is ``"step"`` (value of the bin containing z) or ``"linear"``
        (linear between bin centres, constant to the outer edges).
        """
        return tabulated_density(self.z_edges, self.nbar, z, interpolation)

    def to_hdf5_group(self, group) -> None:
        """Store the table in an h5py group."""
        for name in ("z_edges", "nbar", "weighted_counts", "raw_counts", "volumes"):
            group.create_dataset(name, data=getattr(self, name))
        group.attrs["area_sr"] = float(self.area_sr)

    @classmethod
    def from_hdf5_group(cls, group) -> "RedshiftDensity":
        """Read a table written by :meth:`to_hdf5_group`."""
        return cls(*(np.asarray(group[n][()]) for n in
                     ("z_edges", "nbar", "weighted_counts", "raw_counts", "volumes")),
                   area_sr=float(group.attrs["area_sr"]))


def tabulated_density(z_edges, nbar, z, interpolation: str = "step", rows=None) -> np.ndarray:
    """Evaluate binned n(z) tables at redshifts ``z``; 0 outside ``[z_edges[0], z_edges[-1]]``.

    Parameters
    ----------
    z_edges : ndarray, shape (n_bins + 1,)
        Redshift bin edges.
    nbar : ndarray, shape (n_bins,) or (n_rows, n_bins)
        One table, or one table per row (e.g. per depth class).
    z : array_like
        Redshifts.
    interpolation : {"step", "linear"}
        Value of the bin containing z, or linear between bin centres (constant to the edges).
    rows : array_like of int, optional
        With a 2-D ``nbar``: the table of each redshift (negative rows give 0).
    """
    z = np.asarray(z, dtype=np.float64)
    inside = (z >= z_edges[0]) & (z <= z_edges[-1])
    n_bins = z_edges.size - 1
    if rows is None:
        def pick(j):
            return nbar[j]
    else:
        rows = np.asarray(rows, dtype=np.int64)
        inside &= rows >= 0
        safe_rows = np.maximum(rows, 0)

        def pick(j):
            return nbar[safe_rows, j]
    if interpolation == "step":
        values = pick(np.clip(np.searchsorted(z_edges, z, side="right") - 1, 0, n_bins - 1))
    elif interpolation == "linear":
        centres = 0.5 * (z_edges[1:] + z_edges[:-1])
        if rows is None:
            values = np.interp(z, centres, nbar)
        else:
            t = np.interp(z, centres, np.arange(n_bins, dtype=np.float64))
            j0 = np.floor(t).astype(np.int64)
            f = t - j0
            values = (1 - f) * pick(j0) + f * pick(np.minimum(j0 + 1, n_bins - 1))
    else:
        raise ConfigError(f"weights.nz_interpolation = {interpolation!r} is not "
                          "'step' or 'linear'")
    return np.where(inside, values, 0.0)


def redshift_density(z, weights, z_edges, area_sr: float, cosmology) -> RedshiftDensity:
    """n(z) from the weighted redshift histogram and the footprint area.

    Parameters
    ----------
    z : array_like, shape (n,)
        Redshifts of the data.
    weights : array_like, shape (n,) or None
        Completeness/systematic weights of the data (not FKP weights); None means 1.
    z_edges : array_like
        Redshift bin edges.
    area_sr : float
        Effective sky area in steradians (e.g. ``footprint.effective_area_sr()``).
    cosmology
        Fiducial cosmology (distances in Mpc/h).

    Returns
    -------
    RedshiftDensity

    Notes
    -----
    n_i = Σ_{z_j in bin i} w_j / V_i, V_i from :func:`shell_volumes` (common practice).
    """
    z = np.asarray(z, dtype=np.float64).ravel()
    w = np.ones_like(z) if weights is None else np.asarray(weights, dtype=np.float64).ravel()
    if w.shape != z.shape:
        raise InputError(f"n(z): {w.size} weights for {z.size} redshifts")
    edges = np.asarray(z_edges, dtype=np.float64)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
        raise ConfigError("n(z) redshift edges must be an increasing list of at least 2 values")
    if not area_sr > 0:
        raise InputError(f"n(z): footprint area {area_sr} sr must be > 0")
    wc, _ = np.histogram(z, bins=edges, weights=w)
    rc, _ = np.histogram(z, bins=edges)
    vol = shell_volumes(edges, area_sr, cosmology)
    return RedshiftDensity(edges, wc / vol, wc, rc.astype(np.int64), vol, float(area_sr))


def fkp_weights(nbar, p0: float) -> np.ndarray:
    """FKP weights 1 / (1 + nbar P0).

    Parameters
    ----------
    nbar : array_like
        Expected number density at each object, (h/Mpc)^3.
    p0 : float
        Power-spectrum amplitude at the scales of interest, (Mpc/h)^3.

    Notes
    -----
    Feldman, Kaiser & Peacock (1994), §2.3 [equation number from memory].
    """
    if not p0 >= 0:
        raise ConfigError(f"weights.fkp_p0 = {p0} must be >= 0 (Mpc/h)^3")
    return 1.0 / (1.0 + np.asarray(nbar, dtype=np.float64) * p0)


def combine_fkp(weights, z, density: RedshiftDensity, p0: float,
                interpolation: str = "step") -> np.ndarray:
    """Catalogue weights times FKP weights at each object's redshift."""
    z = np.asarray(z, dtype=np.float64)
    base = np.ones_like(z) if weights is None else np.asarray(weights, dtype=np.float64)
    return base * fkp_weights(density.at(z, interpolation), p0)


@dataclass(frozen=True)
class WeightsSettings:
    """Config section ``[weights]``: n(z) binning and FKP weights."""

    fkp: bool = setting(True, "multiply data and random weights by FKP weights")
    fkp_p0: float = setting(1.0e4, "FKP power amplitude P0 (1e4 is usual for galaxy BAO "
                                   "samples; 2e4 is also used)", unit="(Mpc/h)^3", low=0.0)
    nz_bin_width: float = setting(0.005, "redshift bin width of the n(z) histogram", low=1e-5,
                                  high=1.0, low_open=True)
    nz_interpolation: str = setting("step", "how n(z) is evaluated between bins",
                                    choices=("step", "linear"))
