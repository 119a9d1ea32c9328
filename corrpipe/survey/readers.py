"""Reading named columns from catalogue files (FITS, HDF5, ECSV, CSV, Parquet).

:func:`read_columns` reads named columns into float64 arrays (masked cells become NaN) and
nothing else; :func:`detect_format` tells the format from the file name;
:func:`file_digest` hashes a file for provenance. Validation of the values is
:mod:`corrpipe.survey.checks`; building a catalogue from them is :mod:`corrpipe.survey.catalog`.

Supported files
---------------
* FITS binary tables (``.fits``, ``.fit``, ``.fits.gz``); ``table`` selects the HDU (name or
  index), default the first table HDU.
* HDF5 (``.h5``, ``.hdf5``), two layouts: a table written by astropy (one compound dataset;
  ``table`` is its path, default the only compound dataset in the file), or a plain group
  holding one 1-D dataset per column (``table`` is the group path, default the file root).
* ECSV (``.ecsv``) and CSV (``.csv``) through astropy's ASCII readers; empty cells read as NaN.
* Parquet (``.parquet``, ``.pq``) through astropy, which needs the ``pyarrow`` package.
"""

from __future__ import annotations

import hashlib
import logging
import os
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from corrpipe.errors import InputError

__all__ = ["FORMATS", "detect_format", "read_columns", "file_digest"]

logger = logging.getLogger(__name__)

FORMATS = ("fits", "hdf5", "ecsv", "csv", "parquet")
"""File formats :func:`read_columns` understands."""

_SUFFIXES = {
    ".fits": "fits", ".fit": "fits", ".fts": "fits", ".fits.gz": "fits", ".fit.gz": "fits",
    ".h5": "hdf5", ".hdf5": "hdf5", ".he5": "hdf5",
    ".ecsv": "ecsv", ".csv": "csv",
    ".parquet": "parquet", ".pq": "parquet",
}


def detect_format(path: str | os.PathLike) -> str:
    """Return the file format implied by the file name suffix (one of :data:`FORMATS`).

    Raises
    ------
    InputError
        Unknown suffix; the message lists the known ones.
    """
    name = Path(path).name.lower()
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if name.endswith(suffix):
            return _SUFFIXES[suffix]
    raise InputError(f"{path}: cannot tell the file format from its name; use one of the "
                     f"suffixes {sorted(_SUFFIXES)} or set format to one of {list(FORMATS)}")


def read_columns(path: str | os.PathLike, names: Sequence[str], *, fmt: str | None = None,
                 table: str | int | None = None) -> dict[str, np.ndarray]:
    """Read the named columns of a table file as float64 arrays.

    Parameters
    ----------
    path : path-like
        Table file.
    names : sequence of str
        Columns to read (case-sensitive; a case-insensitive match is used when the exact
        name is absent and the match is unique).
    fmt : str, optional
        One of :data:`FORMATS`; default from the suffix (:func:`detect_format`).
    table : str or int, optional
        FITS HDU (name or index) or HDF5 path of the table; default the first table.

    Returns
    -------
    dict of str to ndarray of float64, shape (N,)
        One array per requested name; masked or empty cells are NaN.

    Raises
    ------
    InputError
        Missing file, unreadable file, missing column (the message lists the available
        columns), non-numeric or multi-dimensional column, columns of different lengths.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: catalogue file not found; check the path (relative paths "
                         "are read from the config file's folder)")
    fmt = detect_format(path) if fmt is None else fmt
    if fmt not in FORMATS:
        raise InputError(f"{path}: unknown format {fmt!r}; use one of {list(FORMATS)}")
    names = list(dict.fromkeys(names))
    if fmt == "hdf5":
        raw = _read_hdf5(path, names, table)
    elif fmt == "parquet":
        raw = _read_parquet(path, names)
    else:
        raw = _read_astropy(path, names, fmt, table)
    out = {}
    for name in names:
        out[name] = _numeric(raw[name], path, name)
    lengths = {name: arr.shape[0] for name, arr in out.items()}
    if len(set(lengths.values())) > 1:
        raise InputError(f"{path}: the columns have different lengths {lengths}; every column "
                         "of a catalogue must have one value per object")
    return out


def _resolve_names(path: Path, names: Sequence[str], available: Sequence[str]) -> dict[str, str]:
    """Map each requested name to a column in the file, or raise listing the available ones."""
    available = list(available)
    lower = {}
    for a in available:
        lower.setdefault(a.lower(), []).append(a)
    mapping, missing = {}, []
    for name in names:
        if name in available:
            mapping[name] = name
        elif len(lower.get(name.lower(), [])) == 1:
            mapping[name] = lower[name.lower()][0]
        else:
            missing.append(name)
    if missing:
        raise InputError(
            f"{path}: column(s) {missing} not found; the file has columns {available}. Set "
            "the column names in the [catalogue] table (e.g. ra_column, dec_column, "
            "redshift_column, weight_columns)")
    return mapping


def _read_astropy(path: Path, names: list[str], fmt: str, table) -> dict:
    """FITS, ECSV and CSV through astropy.table."""
    from astropy.table import Table

    kwargs: dict[str, Any] = {}
    if fmt == "fits":
        kwargs["format"] = "fits"
        if table is not None:
            kwargs["hdu"] = int(table) if str(table).isdigit() else table
    else:
        kwargs["format"] = "ascii.ecsv" if fmt == "ecsv" else "ascii.csv"
    try:
        data = Table.read(path, **kwargs)
    except Exception as exc:
        raise InputError(f"{path}: cannot read as {fmt.upper()}: {exc}. Check the file and "
                         "the format setting") from exc
    mapping = _resolve_names(path, names, data.colnames)
    return {name: data[col] for name, col in mapping.items()}


def _read_parquet(path: Path, names: list[str]) -> dict:
    """Read only the needed Parquet columns with pyarrow (nulls become masked cells)."""
    try:
        from pyarrow import parquet
    except ImportError as exc:
        raise InputError(f"{path}: reading Parquet needs the pyarrow package; install it "
                         "(pip install pyarrow) or convert the file to FITS or HDF5") from exc
    try:
        available = list(parquet.read_schema(path).names)
        mapping = _resolve_names(path, names, available)
        data = parquet.read_table(path, columns=sorted(set(mapping.values())))
    except InputError:
        raise
    except Exception as exc:
        raise InputError(f"{path}: cannot read as PARQUET: {exc}. Check the file and the "
                         "format setting") from exc
    out = {}
    for name, col in mapping.items():
        chunked = data.column(col)
        values = np.asarray(chunked.to_numpy())
        nulls = np.asarray(chunked.is_null().to_numpy(), dtype=bool)
        out[name] = np.ma.MaskedArray(values, mask=nulls) if nulls.any() else values
    return out


def _read_hdf5(path: Path, names: list[str], table) -> dict:
    """Astropy-written HDF5 tables (compound dataset) or groups of 1-D column datasets."""
    import h5py

    try:
        handle = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"{path}: cannot open as HDF5: {exc}") from exc
    with handle:
        if table is None:
            compound = _compound_datasets(handle)
            if len(compound) > 1:
                raise InputError(f"{path}: the HDF5 file holds several tables {compound}; set "
                                 "table (the [catalogue] key 'table') to the one to read")
            node = handle[compound[0]] if compound else handle
        else:
            if str(table) not in handle:
                raise InputError(f"{path}: HDF5 path {table!r} not found; the file holds "
                                 f"{sorted(handle.keys())}")
            node = handle[str(table)]
        if isinstance(node, h5py.Dataset):
            if node.dtype.names is None:
                raise InputError(f"{path}: HDF5 dataset {node.name!r} is not a table (no named "
                                 "fields); point table at a group of 1-D column datasets or at "
                                 "an astropy-written table")
            available = list(node.dtype.names)
            mapping = _resolve_names(path, names, available)
            values = node[()]
            return {n: values[c] for n, c in mapping.items()}
        available = [k for k, v in node.items() if isinstance(v, h5py.Dataset)]
        mapping = _resolve_names(path, names, available)
        return {n: node[c][()] for n, c in mapping.items()}


def _compound_datasets(handle) -> list[str]:
    import h5py

    found = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.dtype.names is not None:
            found.append(name)

    handle.visititems(visit)
    return found


def _numeric(column, path: Path, name: str) -> np.ndarray:
    """Convert one column to float64 with masked cells as NaN, or raise naming the column."""
    mask = getattr(column, "mask", None)
    data = np.asarray(getattr(column, "data", column))
    if data.ndim != 1:
        raise InputError(f"{path}: column {name!r} has shape {data.shape}; expected one value "
                         "per row (a 1-D column)")
    if data.dtype.kind not in "biuf":
        raise InputError(f"{path}: column {name!r} holds {data.dtype} values, not numbers; "
                         "choose a numeric column or convert it")
    out = np.array(data, dtype=np.float64)
    if mask is not None and np.any(mask):
        out[np.asarray(mask, dtype=bool)] = np.nan
    return out


def file_digest(path: str | os.PathLike, chunk_bytes: int = 1 << 20) -> str:
    """SHA-256 hex digest of a file's bytes, read in chunks (for provenance).

    Raises
    ------
    InputError
        The file cannot be read.
    """
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(chunk_bytes), b""):
                digest.update(block)
    except OSError as exc:
        raise InputError(f"{path}: cannot read the file to compute its digest: {exc}") from exc
    return digest.hexdigest()
