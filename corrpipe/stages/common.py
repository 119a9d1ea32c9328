"""Helpers the stage modules share: the fiducial cosmology of an analysis, JSON and HDF5
storage of arrays and catalogues."""

from __future__ import annotations

import json
from typing import Any

import h5py
import numpy as np

__all__ = ["to_json", "cosmology_of", "write_arrays", "store_catalogue", "read_catalogue"]


def to_json(obj: Any) -> str:
    """Canonical JSON text (sorted keys; arrays as lists, other objects as strings)."""
    return json.dumps(obj, sort_keys=True, default=lambda o: o.tolist()
                      if isinstance(o, np.ndarray) else str(o))


def cosmology_of(analysis):
    """The analysis' fiducial :class:`corrpipe.cosmology.Cosmology` (``[cosmology]``)."""
    return analysis.cosmology.build()


def write_arrays(group: h5py.Group, arrays: dict[str, Any]) -> None:
    """Store each non-None array of ``arrays`` as a dataset of ``group``."""
    for key, value in arrays.items():
        if value is None:
            continue
        group.create_dataset(key, data=np.asarray(value))


def store_catalogue(group: h5py.Group, cat) -> None:
    """Store a :class:`corrpipe.survey.catalog.Catalogue` in an HDF5 group."""
    write_arrays(group, {"positions": cat.positions, "weights": cat.weights, "ra": cat.ra,
                          "dec": cat.dec, "z": cat.z, "regions": cat.regions})
    group.attrs["name"] = cat.name
    group.attrs["box_size"] = -1.0 if cat.box_size is None else float(cat.box_size)
    group.attrs["los_axis"] = -1 if cat.los_axis is None else int(cat.los_axis)
    group.attrs["meta"] = to_json(cat.meta)


def read_catalogue(group: h5py.Group):
    """Read a catalogue stored by :func:`store_catalogue`."""
    from corrpipe.survey.catalog import Catalogue

    get = lambda k: group[k][()] if k in group else None  # noqa: E731
    box = float(group.attrs["box_size"])
    axis = int(group.attrs["los_axis"])
    return Catalogue(positions=get("positions"), weights=get("weights"), ra=get("ra"),
                     dec=get("dec"), z=get("z"), box_size=None if box < 0 else box,
                     los_axis=None if axis < 0 else axis, regions=get("regions"),
                     name=str(group.attrs["name"]), meta=json.loads(group.attrs["meta"]))
