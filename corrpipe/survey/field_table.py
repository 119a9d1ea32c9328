"""Read a table of fields (FITS, ECSV or CSV) into a :class:`~corrpipe.survey.fields.FieldFootprint`.

Columns (names matched without regard to case)
----------------------------------------------
``ra``, ``dec``
    Field centre, degrees (required).
``shape``
    ``circle``, ``square`` or ``rectangle`` per field. Without it, a table with a ``radius``
    column and no side columns holds circles, and one with side columns holds rectangles.
``side``, or ``side_a`` and ``side_b``
    Sides of squares / rectangles (``side_a`` along the position angle), in ``size_unit``.
``radius``
    Circle radius, in ``size_unit``.
``position_angle``
    Direction of ``side_a``, degrees from north through east (default 0).
``completeness``
    Observed fraction of targets, in [0, 1] (default 1).
``depth_class``
    Integer group of fields sharing one radial selection (default 0).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.survey.fields import CIRCLE, RECTANGLE, FieldFootprint
from corrpipe.survey.readers import detect_format

__all__ = ["SIZE_UNITS", "field_footprint_from_settings", "read_field_table"]

SIZE_UNITS = {"deg": 1.0, "arcmin": 1.0 / 60.0, "arcsec": 1.0 / 3600.0}
"""Units accepted for field sizes, with their size in degrees."""

_SHAPES = {"circle": CIRCLE, "square": RECTANGLE, "rectangle": RECTANGLE}


def _read_table(path: Path):
    from astropy.table import Table

    fmt = detect_format(path)
    if fmt not in ("fits", "ecsv", "csv"):
        raise InputError(f"{path}: field tables are read from FITS, ECSV or CSV files, not "
                         f"{fmt.upper()}")
    try:
        return Table.read(path, format={"fits": "fits", "ecsv": "ascii.ecsv",
                                        "csv": "ascii.csv"}[fmt])
    except Exception as exc:
        raise InputError(f"{path}: cannot read the field table as {fmt.upper()} ({exc}); "
                         "check the file") from exc


def _column(table, name: str, path: Path, *, required: bool = False, what: str = ""):
    match = [c for c in table.colnames if c.lower() == name]
    if not match:
        if required:
            raise InputError(f"{path}: the field table has no {name!r} column{what}; its "
                             f"columns are {table.colnames}")
        return None
    col = table[match[0]]
    if hasattr(col, "filled"):
        col = col.filled(np.nan) if col.dtype.kind == "f" else col.filled(col.dtype.type())
    return np.asarray(col)


def _numeric(values, name: str, path: Path) -> np.ndarray:
    try:
        return np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{path}: field-table column {name!r} is not numeric") from exc


def read_field_table(path: str | os.PathLike, *, size_unit: str = "arcmin",
                     vetoes: FieldFootprint | None = None, depth_groups: int = 0,
                     overlap_samples: int = 4096) -> FieldFootprint:
    """Read a field table and build its footprint.

    Parameters
    ----------
    path : path-like
        FITS, ECSV or CSV table, one row per field (columns in the module docstring).
    size_unit : {"deg", "arcmin", "arcsec"}
        Unit of ``side``/``side_a``/``side_b``/``radius``.
    vetoes : FieldFootprint, optional
        Holes removed from the fields.
    depth_groups : int
        Without a ``depth_class`` column, group the fields into this many classes by the
        quantiles of a ``depth`` column (any quantity that orders the fields by depth, e.g.
        the line-flux limit); 0 keeps one class.
    overlap_samples : int
        See :class:`~corrpipe.survey.fields.FieldFootprint`.

    Raises
    ------
    InputError
        Missing file or column, unknown shape, non-numeric column, and every check of
        :class:`~corrpipe.survey.fields.FieldFootprint` (sizes, completeness, ...), each
        naming the file, the column and the first bad rows.
    """
    path = Path(path)
    where = f"field table '{path}'"
    if not path.is_file():
        raise InputError(f"{where} does not exist; check footprint.fields_file")
    if size_unit not in SIZE_UNITS:
        raise InputError(f"{where}: size unit {size_unit!r} is not one of {list(SIZE_UNITS)}")
    table = _read_table(path)
    if len(table) == 0:
        raise InputError(f"{where} has no rows; give at least one field")
    ra = _numeric(_column(table, "ra", path, required=True), "ra", path)
    dec = _numeric(_column(table, "dec", path, required=True), "dec", path)
    n = ra.size
    unit = SIZE_UNITS[size_unit]
    side = _column(table, "side", path)
    side_a, side_b = _column(table, "side_a", path), _column(table, "side_b", path)
    if side_a is None:
        side_a = side
    if side_b is None:
        side_b = side_a
    radius = _column(table, "radius", path)
    shape_text = _column(table, "shape", path)
    if shape_text is None:
        if radius is not None and side_a is None:
            shape = np.full(n, CIRCLE)
        elif side_a is not None and radius is None:
            shape = np.full(n, RECTANGLE)
        else:
            raise InputError(f"{where}: give a 'radius' column (circles) or a 'side' / "
                             "'side_a' column (squares, rectangles), or a 'shape' column "
                             f"saying which; the columns are {table.colnames}")
    else:
        words = np.char.lower(np.char.strip(shape_text.astype(str)))
        bad = ~np.isin(words, list(_SHAPES))
        if np.any(bad):
            rows = np.flatnonzero(bad)
            raise InputError(f"{where}: column 'shape' has {rows.size} unknown value(s), e.g. "
                             f"{words[rows[0]]!r} in row {rows[0]}; use one of {list(_SHAPES)}")
        shape = np.array([_SHAPES[w] for w in words], dtype=np.int64)
        is_square = words == "square"
        if side_b is not None and side_a is not None:
            side_b = np.where(is_square, side_a, side_b)
    if np.any(shape == RECTANGLE) and side_a is None:
        raise InputError(f"{where}: squares and rectangles need a 'side' (or 'side_a' and "
                         f"'side_b') column; the columns are {table.colnames}")
    if np.any(shape == CIRCLE) and radius is None:
        raise InputError(f"{where}: circles need a 'radius' column; the columns are "
                         f"{table.colnames}")

    def size(values, name):
        return None if values is None else _numeric(values, name, path) * unit

    pa = _column(table, "position_angle", path)
    comp = _column(table, "completeness", path)
    cls = _column(table, "depth_class", path)
    if cls is not None:
        cls_f = _numeric(cls, "depth_class", path)
        bad = ~np.isfinite(cls_f) | (cls_f != np.round(cls_f))
        if np.any(bad):
            raise InputError(f"{where}: column 'depth_class' must hold whole numbers; row "
                             f"{np.flatnonzero(bad)[0]} has {cls_f[bad][0]!r}")
        cls = cls_f.astype(np.int64)
    elif depth_groups > 0:
        depth = _column(table, "depth", path, required=True,
                        what=" (footprint.field_depth_groups > 0 groups fields by it)")
        depth = _numeric(depth, "depth", path)
        if not np.all(np.isfinite(depth)):
            bad = np.flatnonzero(~np.isfinite(depth))
            raise InputError(f"{where}: column 'depth' is not finite in row {bad[0]}")
        cuts = np.quantile(depth, np.linspace(0, 1, int(depth_groups) + 1)[1:-1])
        cls = np.searchsorted(cuts, depth, side="right").astype(np.int64)
    return FieldFootprint(
        ra, dec, shape, size(side_a, "side_a"), size(side_b, "side_b"),
        None if pa is None else _numeric(pa, "position_angle", path),
        size(radius, "radius"),
        None if comp is None else _numeric(comp, "completeness", path), cls,
        vetoes=vetoes, source=where, overlap_samples=overlap_samples)


def field_footprint_from_settings(settings) -> FieldFootprint:
    """The field footprint a ``[footprint]`` table with ``kind = "fields"`` describes."""
    if not settings.fields_file:
        raise ConfigError("footprint.kind = 'fields' needs footprint.fields_file")
    holes = None
    if settings.field_vetoes_file:
        holes = read_field_table(settings.field_vetoes_file, size_unit=settings.field_size_unit)
    return read_field_table(settings.fields_file, size_unit=settings.field_size_unit,
                            vetoes=holes, depth_groups=settings.field_depth_groups,
                            overlap_samples=settings.field_overlap_samples)
