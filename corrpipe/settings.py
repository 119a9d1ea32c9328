"""Declaring configuration fields once: default, unit, description and allowed values.

Every module that owns a config section declares its settings as a frozen dataclass whose
fields are made with :func:`setting`. The config loader (:mod:`corrpipe.config`) reads the
metadata to validate TOML values and to print the config reference, so a field's default,
unit, doc and range live in exactly one place.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Mapping, Sequence

__all__ = ["setting", "setting_info", "fingerprint_values", "to_plain"]


def setting(
    default: Any = dataclasses.MISSING,
    doc: str = "",
    *,
    unit: str | None = None,
    choices: Sequence[Any] | None = None,
    low: float | None = None,
    high: float | None = None,
    low_open: bool = False,
    high_open: bool = False,
    path: bool = False,
    factory: Any = dataclasses.MISSING,
    neutral_default: bool = False,
) -> Any:
    """Declare one configuration field.

    Parameters
    ----------
    default
        Default value; omit for a required field.
    doc : str
        One-line description shown in error messages and the config reference.
    unit : str, optional
        Physical unit of the value (e.g. ``"Mpc/h"``).
    choices : sequence, optional
        Allowed values.
    low, high : float, optional
        Allowed numeric range (inclusive unless ``low_open``/``high_open``). For sequences the
        range applies to every element.
    path : bool
        The value is a file path (or list of paths); relative paths resolve against the folder
        of the config file.
    factory : callable, optional
        Default factory for mutable defaults (use tuples where possible).
    neutral_default : bool
        The key was added after results were stored with its table, and its default gives
        exactly what runs did before it existed. Fingerprints leave it out while it holds the
        default (:func:`fingerprint_values`), so adding it does not make stored stages stale.
    """
    meta = {
        "doc": doc,
        "unit": unit,
        "choices": tuple(choices) if choices is not None else None,
        "low": low,
        "high": high,
        "low_open": low_open,
        "high_open": high_open,
        "path": path,
        "neutral_default": neutral_default,
    }
    if factory is not dataclasses.MISSING:
        return dataclasses.field(default_factory=factory, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def setting_info(f: dataclasses.Field) -> dict:
    """Return the metadata declared with :func:`setting` (empty values if none)."""
    base = {"doc": "", "unit": None, "choices": None, "low": None, "high": None,
            "low_open": False, "high_open": False, "path": False, "neutral_default": False}
    base.update(dict(f.metadata))
    return base


def fingerprint_values(settings: Any) -> dict:
    """The fields of a settings dataclass that identify its results, as a plain dict.

    Every field, except one declared with ``neutral_default=True`` while it holds its
    default. Tuples become lists (JSON-friendly).
    """
    out = {}
    for f in dataclasses.fields(settings):
        value = getattr(settings, f.name)
        if f.metadata.get("neutral_default") and f.default is not dataclasses.MISSING \
                and value == f.default:
            continue
        out[f.name] = to_plain(value)
    return out


def to_plain(obj: Any) -> Any:
    """Tuples and mappings (and nested settings dataclasses) as JSON-friendly lists/dicts."""
    if isinstance(obj, Mapping):
        return {str(k): to_plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_plain(v) for v in obj]
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return to_plain(dataclasses.asdict(obj))
    return obj
