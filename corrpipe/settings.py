"""Declaring configuration fields once: default, unit, description and allowed values.

Every module that owns a config section declares its settings as a frozen dataclass whose
fields are made with :func:`setting`. The config loader (:mod:`corrpipe.config`) reads the
metadata to validate TOML values and to print the config reference, so a field's default,
unit, doc and range live in exactly one place.
"""

from __future__ import annotations

import dataclasses
from typing import Any, Sequence

__all__ = ["setting", "setting_info"]


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
    }
    if factory is not dataclasses.MISSING:
        return dataclasses.field(default_factory=factory, metadata=meta)
    return dataclasses.field(default=default, metadata=meta)


def setting_info(f: dataclasses.Field) -> dict:
    """Return the metadata declared with :func:`setting` (empty values if none)."""
    base = {"doc": "", "unit": None, "choices": None, "low": None, "high": None,
            "low_open": False, "high_open": False, "path": False}
    base.update(dict(f.metadata))
    return base
