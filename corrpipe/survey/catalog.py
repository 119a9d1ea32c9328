"""Galaxy and random catalogues: the :class:`Catalogue` type, cuts and sky -> Cartesian.

Three separate steps, each usable on its own:

1. :func:`read_columns` reads named columns from a FITS, HDF5, ECSV, CSV or Parquet file into
   float64 arrays (masked cells become NaN) and nothing else.
2. :func:`check_sky_columns` / :func:`check_box_columns` validate them, naming the file, the
   column, the number of bad rows and the first bad row indices.
3. :func:`sky_catalogue` / :func:`box_catalogue` apply the redshift cut, form the total weight
   as the product of the weight columns and convert to Cartesian positions in Mpc/h.

:func:`load_sky_catalogue`, :func:`load_box_catalogue` and :func:`load_catalogue` (from a
``[catalogue]`` config table) chain the three.

File reading is :mod:`corrpipe.survey.readers` (formats listed there) and the row checks are
:mod:`corrpipe.survey.checks`; both are re-exported here.

Every check is applied to every row of the file, before the redshift cut: bad values are
reported, never silently dropped.
"""

from __future__ import annotations

import dataclasses
import logging
import os
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting
from corrpipe.survey.checks import check_box_columns, check_sky_columns, quote_rows
from corrpipe.survey.readers import FORMATS, detect_format, file_digest, read_columns

__all__ = [
    "Catalogue",
    "CatalogueSettings",
    "FORMATS",
    "detect_format",
    "read_columns",
    "check_sky_columns",
    "check_box_columns",
    "sky_catalogue",
    "box_catalogue",
    "load_sky_catalogue",
    "load_box_catalogue",
    "load_catalogue",
    "file_digest",
    "LOS_AXES",
]

logger = logging.getLogger(__name__)


LOS_AXES = {"x": 0, "y": 1, "z": 2}
"""Line-of-sight axis names of a periodic box and their index."""

# ---------------------------------------------------------------------- the catalogue type

@dataclass(frozen=True)
class Catalogue:
    """Points with weights: a survey catalogue on the sky or a periodic-box catalogue.

    Parameters
    ----------
    positions : ndarray of float64, shape (N, 3)
        Comoving Cartesian positions, Mpc/h. Sky catalogues have the observer at the
        origin; box catalogues lie in [0, box_size).
    weights : ndarray of float64, shape (N,)
        Total weight of each object (>= 0).
    ra, dec : ndarray of float64, shape (N,), or None
        Right ascension in [0, 360) and declination in [-90, 90], degrees (sky only).
    z : ndarray of float64, shape (N,), or None
        Redshift (sky only).
    box_size : float or None
        Side of the periodic box, Mpc/h (box only).
    los_axis : int or None
        Index (0, 1, 2) of the fixed line-of-sight axis of a box catalogue.
    regions : ndarray of int64, shape (N,), or None
        Jackknife region label of each object.
    name : str
        Label used in logs and outputs.
    meta : dict
        Provenance: source file, its digest, row counts before and after cuts.
    """

    positions: np.ndarray
    weights: np.ndarray
    ra: np.ndarray | None = None
    dec: np.ndarray | None = None
    z: np.ndarray | None = None
    box_size: float | None = None
    los_axis: int | None = None
    regions: np.ndarray | None = None
    name: str = "catalogue"
    meta: dict = field(default_factory=dict, compare=False)

    def __post_init__(self) -> None:
        pos = np.ascontiguousarray(self.positions, dtype=np.float64)
        if pos.ndim != 2 or pos.shape[1] != 3:
            raise InputError(f"catalogue {self.name!r}: positions must have shape (N, 3); "
                             f"got {pos.shape}")
        n = pos.shape[0]
        object.__setattr__(self, "positions", pos)
        object.__setattr__(self, "weights", _vector(self.weights, n, "weights", self.name))
        for key in ("ra", "dec", "z"):
            value = getattr(self, key)
            if value is not None:
                object.__setattr__(self, key, _vector(value, n, key, self.name))
        if self.regions is not None:
            object.__setattr__(self, "regions",
                               _vector(self.regions, n, "regions", self.name, np.int64))
        if self.box_size is not None:
            if not np.isfinite(self.box_size) or self.box_size <= 0:
                raise InputError(f"catalogue {self.name!r}: box_size must be a positive length "
                                 f"in Mpc/h; got {self.box_size!r}")
            object.__setattr__(self, "box_size", float(self.box_size))
        if self.los_axis is not None and self.los_axis not in (0, 1, 2):
            raise InputError(f"catalogue {self.name!r}: los_axis must be 0, 1 or 2 (x, y, z); "
                             f"got {self.los_axis!r}")

    def __len__(self) -> int:
        return int(self.positions.shape[0])

    @property
    def size(self) -> int:
        """Number of objects N."""
        return len(self)

    @property
    def is_box(self) -> bool:
        """True for a periodic-box catalogue."""
        return self.box_size is not None

    @property
    def sum_weights(self) -> float:
        """Sum of the weights."""
        return float(np.sum(self.weights))

    @property
    def sum_weights_sq(self) -> float:
        """Sum of the squared weights."""
        return float(np.dot(self.weights, self.weights))

    def select(self, mask: np.ndarray, name: str | None = None) -> "Catalogue":
        """Return the sub-catalogue of rows where ``mask`` (bool, shape (N,)) is true."""
        mask = np.asarray(mask)
        if mask.shape != (len(self),) or mask.dtype != bool:
            raise InputError(f"catalogue {self.name!r}: selection mask must be boolean with "
                             f"shape ({len(self)},); got {mask.dtype} {mask.shape}")

        def pick(a):
            return None if a is None else a[mask]

        return dataclasses.replace(
            self, positions=self.positions[mask], weights=self.weights[mask], ra=pick(self.ra),
            dec=pick(self.dec), z=pick(self.z), regions=pick(self.regions),
            name=self.name if name is None else name, meta=dict(self.meta))

    def with_regions(self, regions: np.ndarray) -> "Catalogue":
        """Return a copy carrying jackknife region labels (int, shape (N,))."""
        return dataclasses.replace(self, regions=regions, meta=dict(self.meta))

    def with_weights(self, weights: np.ndarray) -> "Catalogue":
        """Return a copy with new total weights (float, shape (N,), >= 0)."""
        w = np.asarray(weights, dtype=np.float64)
        if w.shape == (len(self),) and (not np.all(np.isfinite(w)) or np.any(w < 0)):
            bad = np.flatnonzero(~np.isfinite(w) | (w < 0))
            raise InputError(f"catalogue {self.name!r}: {bad.size} new weight(s) are negative "
                             f"or not finite (rows {quote_rows(bad)}); weights must be >= 0")
        return dataclasses.replace(self, weights=w, meta=dict(self.meta))


def _vector(values, n: int, key: str, name: str, dtype=np.float64) -> np.ndarray:
    arr = np.ascontiguousarray(values, dtype=dtype)
    if arr.shape != (n,):
        raise InputError(f"catalogue {name!r}: {key} must have shape ({n},) to match the "
                         f"{n} positions; got {arr.shape}")
    return arr


# ---------------------------------------------------------------------- settings

@dataclass(frozen=True)
class CatalogueSettings:
    """The ``[catalogue]`` config table: where the data catalogue is and how to read it."""

    path: str = setting(doc="catalogue file (FITS, HDF5, ECSV, CSV or Parquet)", path=True)
    kind: str = setting("sky", "sky: RA/Dec/redshift survey catalogue; box: periodic box",
                        choices=("sky", "box"))
    format: str = setting("auto", "file format (auto: from the file name suffix)",
                          choices=("auto",) + FORMATS)
    table: str | None = setting(None, "FITS HDU name/index or HDF5 path of the table "
                                      "(empty: the first table)")
    ra_column: str = setting("RA", "column of right ascension, degrees (sky)")
    dec_column: str = setting("DEC", "column of declination, degrees (sky)")
    redshift_column: str = setting("Z", "column of redshift (sky)")
    x_column: str = setting("x", "column of x position, Mpc/h (box)")
    y_column: str = setting("y", "column of y position, Mpc/h (box)")
    z_column: str = setting("z", "column of z position, Mpc/h (box)")
    weight_columns: tuple[str, ...] = setting((), "columns whose product is the total weight "
                                                  "(empty: every weight is 1)")
    z_min: float = setting(0.0, "keep redshifts z_min <= z < z_max (sky)", low=0.0)
    z_max: float | None = setting(None, "upper redshift cut, exclusive (empty: none)",
                                  low=0.0, low_open=True)
    box_size: float | None = setting(None, "side of the periodic box (box)", unit="Mpc/h",
                                     low=0.0, low_open=True)
    los_axis: str = setting("z", "fixed line-of-sight axis of the box", choices=tuple(LOS_AXES))
    wrap_tolerance: float = setting(0.05, "box positions up to this fraction of box_size "
                                          "outside [0, box_size) are wrapped; further is an error",
                                    low=0.0, high=0.5)
    name: str = setting("data", "label of the catalogue in logs and outputs")
    box_redshift: float = setting(0.5, "redshift of a periodic box (sets the template's growth "
                                  "and the fiducial distances the dilations refer to)",
                                  low=0.0, high=20.0)

    def validate(self) -> None:
        """Cross-field checks: a box needs its size; the redshift range must be non-empty."""
        if self.kind == "box" and self.box_size is None:
            raise ConfigError("kind = 'box' needs box_size (side of the box in Mpc/h)")
        if self.z_max is not None and self.z_max <= self.z_min:
            raise ConfigError(f"z_max = {self.z_max} must be larger than z_min = {self.z_min}")
        if len(set(self.weight_columns)) != len(self.weight_columns):
            raise ConfigError(f"weight_columns {list(self.weight_columns)} names a column twice")


def load_catalogue(settings: CatalogueSettings, cosmology=None) -> Catalogue:
    """Load the catalogue a ``[catalogue]`` table describes.

    Parameters
    ----------
    settings : CatalogueSettings
        Validated settings.
    cosmology : corrpipe.cosmology.Cosmology, optional
        Fiducial cosmology for sky catalogues (required when ``kind = "sky"``).
    """
    fmt = None if settings.format == "auto" else settings.format
    if settings.kind == "box":
        columns = dict(x=settings.x_column, y=settings.y_column, z=settings.z_column)
        return load_box_catalogue(
            settings.path, columns=columns, weight_columns=settings.weight_columns,
            box_size=settings.box_size, los_axis=settings.los_axis, name=settings.name, fmt=fmt,
            table=settings.table, wrap_tolerance=settings.wrap_tolerance)
    columns = dict(ra=settings.ra_column, dec=settings.dec_column, z=settings.redshift_column)
    return load_sky_catalogue(
        settings.path, columns=columns, weight_columns=settings.weight_columns,
        z_min=settings.z_min, z_max=settings.z_max, cosmology=cosmology, name=settings.name,
        fmt=fmt, table=settings.table)


# ---------------------------------------------------------------------- building catalogues

def _total_weight(weights: Mapping[str, np.ndarray], n: int) -> np.ndarray:
    total = np.ones(n, dtype=np.float64)
    for values in weights.values():
        total *= values
    return total


def sky_catalogue(ra, dec, z, weights: Mapping[str, np.ndarray] | None = None, *,
                  z_min: float = 0.0, z_max: float | None = None, cosmology=None,
                  name: str = "catalogue", where: str = "<arrays>",
                  names: Mapping[str, str] | None = None, meta: dict | None = None) -> Catalogue:
    """Build a sky :class:`Catalogue` from arrays: validate, cut in redshift, convert.

    Parameters
    ----------
    ra, dec : array_like, shape (N,)
        Degrees; RA is wrapped to [0, 360).
    z : array_like, shape (N,)
        Redshift. Rows with z_min <= z < z_max are kept; the number removed is logged at INFO.
    weights : mapping of str to array_like, optional
        Weight columns; the total weight is their product (1 when none).
    z_min, z_max : float
        Redshift cut (z_max None: no upper cut).
    cosmology : corrpipe.cosmology.Cosmology
        Fiducial cosmology for the comoving distances.
    name : str
        Catalogue label.
    where : str
        Source label for messages (the file name).
    names : mapping, optional
        File column names for keys ``"ra"``, ``"dec"``, ``"z"`` (messages only).
    meta : dict, optional
        Extra provenance to store.

    Raises
    ------
    InputError
        Any failed check of :func:`check_sky_columns`, or no rows left after the cut.
    """
    from corrpipe.cosmology import sky_to_cartesian

    if cosmology is None:
        raise InputError(f"{where}: a sky catalogue needs a fiducial cosmology (cosmology=) to "
                         "turn redshifts into distances")
    ra = np.asarray(ra, dtype=np.float64)
    dec = np.asarray(dec, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    weights = {k: np.asarray(v, dtype=np.float64) for k, v in (weights or {}).items()}
    check_sky_columns(where, ra, dec, z, weights, names=names)
    if z_max is not None and z_max <= z_min:
        raise ConfigError(f"{where}: redshift cut z_max = {z_max} must exceed z_min = {z_min}")
    keep = z >= z_min
    if z_max is not None:
        keep &= z < z_max
    n_in, n_kept = z.size, int(np.count_nonzero(keep))
    cut_text = f"{z_min:g} <= z < {z_max:g}" if z_max is not None else f"z >= {z_min:g}"
    if n_kept == 0:
        raise InputError(f"{where}: no objects left after the redshift cut {cut_text} (the "
                         f"file's redshifts span {z.min():.4g} to {z.max():.4g}); widen "
                         "z_min/z_max or check the redshift column")
    if n_kept < n_in:
        logger.info("%s: redshift cut %s removed %d of %d rows (%d kept)", where, cut_text,
                    n_in - n_kept, n_in, n_kept)
    total = _total_weight({k: v[keep] for k, v in weights.items()}, n_kept)
    if not np.any(total > 0):
        raise InputError(f"{where}: every object kept by the redshift cut has zero total "
                         f"weight (product of {list(weights)}); check the weight columns")
    ra_kept = np.mod(ra[keep], 360.0)
    ra_kept[ra_kept >= 360.0] = 0.0  # mod of tiny negative numbers can round to 360
    dec_kept, z_kept = dec[keep], z[keep]
    info = {"source": where, "rows_read": n_in, "rows_kept": n_kept,
            "z_min": z_min, "z_max": z_max, "weight_columns": list(weights)}
    info.update(meta or {})
    return Catalogue(positions=sky_to_cartesian(ra_kept, dec_kept, z_kept, cosmology),
                     weights=total, ra=ra_kept, dec=dec_kept, z=z_kept, name=name, meta=info)


def box_catalogue(x, y, z, weights: Mapping[str, np.ndarray] | None = None, *,
                  box_size: float, los_axis: str | int = "z", wrap_tolerance: float = 0.05,
                  name: str = "catalogue", where: str = "<arrays>",
                  names: Mapping[str, str] | None = None, meta: dict | None = None) -> Catalogue:
    """Build a periodic-box :class:`Catalogue` from coordinate arrays (Mpc/h).

    Positions are wrapped into [0, box_size); values further than ``wrap_tolerance *
    box_size`` outside are an error (a sign of a wrong unit, box size or a centred box).
    ``los_axis`` is ``"x"``, ``"y"``, ``"z"`` or 0, 1, 2.
    """
    names = {"x": "x", "y": "y", "z": "z", **(names or {})}
    axis = _los_index(los_axis, where)
    cols = {names["x"]: np.asarray(x, dtype=np.float64),
            names["y"]: np.asarray(y, dtype=np.float64),
            names["z"]: np.asarray(z, dtype=np.float64)}
    weights = {k: np.asarray(v, dtype=np.float64) for k, v in (weights or {}).items()}
    check_box_columns(where, cols, box_size, wrap_tolerance, weights)
    n = next(iter(cols.values())).size
    if n == 0:
        raise InputError(f"{where}: the box catalogue has no rows")
    pos = np.column_stack(list(cols.values()))
    pos = np.mod(pos, box_size)
    pos[pos >= box_size] = 0.0
    total = _total_weight(weights, n)
    info = {"source": where, "rows_read": n, "rows_kept": n, "weight_columns": list(weights)}
    info.update(meta or {})
    return Catalogue(positions=pos, weights=total, box_size=float(box_size), los_axis=axis,
                     name=name, meta=info)


def _los_index(los_axis: str | int, where: str) -> int:
    if isinstance(los_axis, str) and los_axis.lower() in LOS_AXES:
        return LOS_AXES[los_axis.lower()]
    if isinstance(los_axis, (int, np.integer)) and int(los_axis) in (0, 1, 2):
        return int(los_axis)
    raise ConfigError(f"{where}: los_axis must be one of 'x', 'y', 'z' (or 0, 1, 2); got "
                      f"{los_axis!r}")


# ---------------------------------------------------------------------- loaders

def load_sky_catalogue(path: str | os.PathLike, *, columns: Mapping[str, str] | None = None,
                       weight_columns: Sequence[str] = (), z_min: float = 0.0,
                       z_max: float | None = None, cosmology=None, name: str = "catalogue",
                       fmt: str | None = None, table: str | int | None = None) -> Catalogue:
    """Read, validate, cut and convert a sky catalogue file.

    Parameters
    ----------
    path : path-like
        FITS, HDF5, ECSV, CSV or Parquet file (see the module docstring).
    columns : mapping, optional
        File column names for keys ``"ra"``, ``"dec"``, ``"z"`` (default ``RA``, ``DEC``,
        ``Z``; matched case-insensitively when unique).
    weight_columns : sequence of str
        Columns whose product is the total weight.
    z_min, z_max : float
        Keep z_min <= z < z_max (z_max None: no upper cut).
    cosmology : corrpipe.cosmology.Cosmology
        Fiducial cosmology for the distances, Mpc/h.
    name : str
        Catalogue label.
    fmt : str, optional
        File format (default from the suffix).
    table : str or int, optional
        FITS HDU or HDF5 path of the table.

    Returns
    -------
    Catalogue
        Sky catalogue; ``meta`` records the file, its sha256 digest and the row counts.
    """
    names = {"ra": "RA", "dec": "DEC", "z": "Z", **dict(columns or {})}
    unknown = set(names) - {"ra", "dec", "z"}
    if unknown:
        raise ConfigError(f"{path}: columns mapping has unknown key(s) {sorted(unknown)}; use "
                          "'ra', 'dec' and 'z'")
    weight_columns = tuple(weight_columns)
    data = read_columns(path, [names["ra"], names["dec"], names["z"], *weight_columns],
                        fmt=fmt, table=table)
    return sky_catalogue(
        data[names["ra"]], data[names["dec"]], data[names["z"]],
        {w: data[w] for w in weight_columns}, z_min=z_min, z_max=z_max, cosmology=cosmology,
        name=name, where=str(path), names=names, meta={"digest": file_digest(path)})


def load_box_catalogue(path: str | os.PathLike, *, columns: Mapping[str, str] | None = None,
                       weight_columns: Sequence[str] = (), box_size: float | None = None,
                       los_axis: str | int = "z", name: str = "catalogue",
                       fmt: str | None = None, table: str | int | None = None,
                       wrap_tolerance: float = 0.05) -> Catalogue:
    """Read and validate a periodic-box catalogue file (positions in Mpc/h).

    Parameters
    ----------
    path : path-like
        FITS, HDF5, ECSV, CSV or Parquet file.
    columns : mapping, optional
        File column names for keys ``"x"``, ``"y"``, ``"z"`` (default ``x``, ``y``, ``z``).
    weight_columns : sequence of str
        Columns whose product is the total weight.
    box_size : float
        Side of the box, Mpc/h.
    los_axis : {"x", "y", "z"} or int
        Fixed line-of-sight axis.
    name : str
        Catalogue label.
    fmt, table
        As for :func:`load_sky_catalogue`.
    wrap_tolerance : float
        Fraction of ``box_size`` by which positions may fall outside [0, box_size) and still
        be wrapped.
    """
    names = {"x": "x", "y": "y", "z": "z", **dict(columns or {})}
    unknown = set(names) - {"x", "y", "z"}
    if unknown:
        raise ConfigError(f"{path}: columns mapping has unknown key(s) {sorted(unknown)}; use "
                          "'x', 'y' and 'z'")
    if box_size is None:
        raise ConfigError(f"{path}: a box catalogue needs box_size (Mpc/h)")
    weight_columns = tuple(weight_columns)
    data = read_columns(path, [names["x"], names["y"], names["z"], *weight_columns],
                        fmt=fmt, table=table)
    return box_catalogue(
        data[names["x"]], data[names["y"]], data[names["z"]],
        {w: data[w] for w in weight_columns}, box_size=box_size, los_axis=los_axis,
        wrap_tolerance=wrap_tolerance, name=name, where=str(path), names=names,
        meta={"digest": file_digest(path)})
