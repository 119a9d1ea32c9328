"""Row checks of catalogue columns: every row, before any cut; bad values are reported,
never silently dropped.

Each check raises :class:`corrpipe.errors.InputError` naming the file, the column, how many
rows are bad and the first bad row indices, and how to fix them.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from corrpipe.errors import InputError

__all__ = ["check_sky_columns", "check_box_columns", "quote_rows"]

_SHOW_ROWS = 5  # bad row indices quoted in an error message


def quote_rows(bad_rows: np.ndarray) -> str:
    """The first few bad row indices, comma-separated (with "..." when there are more)."""
    shown = ", ".join(str(int(i)) for i in bad_rows[:_SHOW_ROWS])
    return shown + (", ..." if bad_rows.size > _SHOW_ROWS else "")


def _fail(where: str, column: str, bad: np.ndarray, problem: str, fix: str) -> None:
    rows = np.flatnonzero(bad)
    raise InputError(f"{where}: column {column!r} has {rows.size} of {bad.size} rows {problem} "
                     f"(first rows, counted from 0: {quote_rows(rows)}); {fix}")


def _check_not_empty(where: str, lengths: Mapping[str, int]) -> None:
    if lengths and max(lengths.values()) == 0:
        raise InputError(f"{where}: the file has no rows (columns {', '.join(lengths)} are "
                         "empty); give a catalogue with at least one object")


def _check_finite(where: str, columns: Mapping[str, np.ndarray]) -> None:
    for name, values in columns.items():
        bad = ~np.isfinite(values)
        if np.any(bad):
            _fail(where, name, bad, "that are NaN, infinite or empty",
                  "remove or fill these rows before loading")


def _check_weights(where: str, weights: Mapping[str, np.ndarray]) -> None:
    for name, values in weights.items():
        bad = values < 0
        if np.any(bad):
            _fail(where, name, bad, "with negative weights",
                  "weights must be >= 0; fix or remove these rows")


def check_sky_columns(where: str, ra: np.ndarray, dec: np.ndarray, z: np.ndarray,
                      weights: Mapping[str, np.ndarray] | None = None, *,
                      names: Mapping[str, str] | None = None) -> None:
    """Validate sky columns; raise :class:`InputError` naming the column and the bad rows.

    Parameters
    ----------
    where : str
        File name (or other label) quoted in messages.
    ra, dec : ndarray, shape (N,)
        Degrees. Any finite RA is accepted (it is wrapped later); Dec must be in [-90, 90].
    z : ndarray, shape (N,)
        Redshift; must be > 0.
    weights : mapping of str to ndarray, optional
        Weight columns by name; each must be finite and >= 0.
    names : mapping, optional
        Column names in the file for keys ``"ra"``, ``"dec"``, ``"z"`` (for the messages).
    """
    names = {"ra": "ra", "dec": "dec", "z": "z", **(names or {})}
    weights = dict(weights or {})
    lengths = {names["ra"]: len(ra), names["dec"]: len(dec), names["z"]: len(z)}
    lengths.update({k: len(v) for k, v in weights.items()})
    if len(set(lengths.values())) > 1:
        raise InputError(f"{where}: columns have different lengths {lengths}; every column "
                         "needs one value per object")
    _check_not_empty(where, lengths)
    _check_finite(where, {names["ra"]: ra, names["dec"]: dec, names["z"]: z, **weights})
    bad = (dec < -90.0) | (dec > 90.0)
    if np.any(bad):
        _fail(where, names["dec"], bad, "with declination outside [-90, 90] degrees",
              "check that the column is declination in degrees (not radians or another angle)")
    bad = z <= 0
    if np.any(bad):
        _fail(where, names["z"], bad, "with redshift <= 0",
              "remove these objects (failed or stellar redshifts) before loading")
    _check_weights(where, weights)


def check_box_columns(where: str, positions: Mapping[str, np.ndarray], box_size: float,
                      wrap_tolerance: float = 0.05,
                      weights: Mapping[str, np.ndarray] | None = None) -> None:
    """Validate box columns: finite, inside [0, box_size) up to the wrap tolerance.

    Parameters
    ----------
    where : str
        File name quoted in messages.
    positions : mapping of str to ndarray, shape (N,)
        The three coordinate columns by name, Mpc/h.
    box_size : float
        Box side, Mpc/h.
    wrap_tolerance : float
        Fraction of ``box_size`` by which values may lie outside [0, box_size) and still be
        wrapped periodically.
    weights : mapping of str to ndarray, optional
        Weight columns by name; each must be finite and >= 0.
    """
    if box_size is None or not np.isfinite(box_size) or box_size <= 0:
        raise InputError(f"{where}: box_size must be a positive length in Mpc/h; got "
                         f"{box_size!r}. Set box_size in the [catalogue] table")
    weights = dict(weights or {})
    lengths = {k: len(v) for k, v in {**positions, **weights}.items()}
    if len(set(lengths.values())) > 1:
        raise InputError(f"{where}: columns have different lengths {lengths}; every column "
                         "needs one value per object")
    _check_not_empty(where, lengths)
    _check_finite(where, {**positions, **weights})
    margin = wrap_tolerance * box_size
    for name, values in positions.items():
        bad = (values < -margin) | (values >= box_size + margin)
        if np.any(bad):
            _fail(where, name, bad,
                  f"outside [0, {box_size:g}) Mpc/h by more than {margin:g} Mpc/h",
                  "check box_size, the length unit (Mpc/h) and whether the box is centred on "
                  "0 (then add box_size/2 to the coordinates)")
    _check_weights(where, weights)
