"""Progress sidecar of a pair count: finished work units saved as they complete.

Layout of the HDF5 file (one file per count)::

    attrs: layout = "corrpipe-pair-progress", layout_version, fingerprint, n_units
    batch_000000/  unit_ids, weighted, [raw], [region_both, region_one]; attrs n_pairs, done
    batch_000001/  ...

Each batch group is written and flushed first; its ``done`` attribute is set last, so an
interruption leaves only complete batches marked done (data first, commit mark last). A file
written for different inputs (other fingerprint), or one that cannot be read, is replaced by a
fresh one: its contents could not be used for this count.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

import h5py
import numpy as np

from corrpipe.errors import CheckpointError

__all__ = ["ProgressSidecar"]

_LAYOUT = "corrpipe-pair-progress"
_LAYOUT_VERSION = 1
_log = logging.getLogger(__name__)


class ProgressSidecar:
    """Saves and reloads the finished units of one count.

    Parameters
    ----------
    path : str or Path
        Sidecar file (created if missing).
    prepared : PreparedCount
        The prepared count; its fingerprint identifies the sidecar's owner.
    """

    def __init__(self, path, prepared) -> None:
        self.path = Path(path)
        self.prepared = prepared
        self.fingerprint = prepared.fingerprint()

    # ------------------------------------------------------------------ reading
    def load(self) -> list:
        """Partial counts of the batches already done (empty for a new or foreign file)."""
        from corrpipe.paircount.units import PartialCounts

        if not self.path.exists():
            self._create()
            return []
        try:
            with h5py.File(self.path, "r") as h5:
                if (h5.attrs.get("layout") != _LAYOUT
                        or int(h5.attrs.get("layout_version", -1)) != _LAYOUT_VERSION
                        or h5.attrs.get("fingerprint") != self.fingerprint):
                    reason = "it belongs to a different count (inputs, bins or plan changed)"
                    parts = None
                else:
                    parts = []
                    for name in sorted(h5):
                        grp = h5[name]
                        if not grp.attrs.get("done", False):
                            continue
                        parts.append(PartialCounts(
                            unit_ids=grp["unit_ids"][()],
                            weighted=grp["weighted"][()],
                            raw=grp["raw"][()] if "raw" in grp else None,
                            region_both=grp["region_both"][()] if "region_both" in grp else None,
                            region_one=grp["region_one"][()] if "region_one" in grp else None,
                            n_pairs=int(grp.attrs["n_pairs"]),
                        ))
        except (OSError, KeyError, ValueError) as exc:
            reason = f"it cannot be read ({exc})"
            parts = None
        if parts is None:
            _log.warning("restarting pair count: progress file %s is not usable because %s",
                         self.path, reason)
            self._create()
            return []
        if not self._consistent(parts):
            _log.warning("restarting pair count: progress file %s holds overlapping or "
                         "malformed batches", self.path)
            self._create()
            return []
        return parts

    def _consistent(self, parts) -> bool:
        nflat = self.prepared.n_flat_bins
        ids = np.concatenate([p.unit_ids for p in parts]) if parts else np.zeros(0, np.int64)
        if np.unique(ids).size != ids.size or (ids.size and (ids.min() < 0 or
                                                             ids.max() >= self.prepared.n_units)):
            return False
        return all(p.weighted.shape == (nflat,) for p in parts)

    # ------------------------------------------------------------------ writing
    def _create(self) -> None:
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            tmp = self.path.with_name(self.path.name + ".tmp")
            with h5py.File(tmp, "w") as h5:
                h5.attrs["layout"] = _LAYOUT
                h5.attrs["layout_version"] = _LAYOUT_VERSION
                h5.attrs["fingerprint"] = self.fingerprint
                h5.attrs["n_units"] = self.prepared.n_units
            os.replace(tmp, self.path)
        except OSError as exc:
            message = (f"cannot create the pair-count progress file {self.path}: {exc}; check "
                       "that the folder exists and is writable")
            raise CheckpointError(message) from exc

    def save(self, part) -> None:
        """Append one finished batch: data first, then its ``done`` mark."""
        try:
            with h5py.File(self.path, "a") as h5:
                name = f"batch_{int(part.unit_ids[0]):06d}"
                if name in h5:
                    del h5[name]
                grp = h5.create_group(name)
                grp.create_dataset("unit_ids", data=part.unit_ids)
                grp.create_dataset("weighted", data=part.weighted)
                if part.raw is not None:
                    grp.create_dataset("raw", data=part.raw)
                if part.region_both is not None:
                    grp.create_dataset("region_both", data=part.region_both, compression="gzip",
                                       compression_opts=1)
                    grp.create_dataset("region_one", data=part.region_one, compression="gzip",
                                       compression_opts=1)
                grp.attrs["n_pairs"] = part.n_pairs
                h5.flush()
                grp.attrs["done"] = True
                h5.flush()
        except OSError as exc:
            message = (f"cannot write pair-count progress to {self.path}: {exc}; free disk space "
                       "or choose another output folder")
            raise CheckpointError(message) from exc
