"""The result type of a pair count: the contract between the counter and the estimators."""

from __future__ import annotations

import dataclasses
import json
from dataclasses import dataclass, field, fields

import numpy as np

__all__ = ["PairCounts"]


@dataclass(frozen=True)
class PairCounts:
    """Weighted pair counts of one catalogue pair (auto or cross) in a 1-D or 2-D binning.

    Parameters
    ----------
    mode : {"s", "smu", "rppi"}
        Binning: isotropic separation, (s, mu) or (r_p, pi).
    edges : tuple of ndarray
        Bin edges, one array per axis: ``(s_edges,)``, ``(s_edges, mu_edges)`` or
        ``(rp_edges, pi_edges)``. Separations in Mpc/h.
    weighted : ndarray of float64, shape (n_bins_0[, n_bins_1])
        Sum over pairs of w_i w_j. An auto-count counts each distinct pair once.
    raw : ndarray of int64 or None
        Number of pairs per bin, if requested.
    auto : bool
        True for an auto-count (catalogue with itself).
    sum_w1, sum_w1_sq, sum_w2, sum_w2_sq : float
        Sums of weights and of squared weights of catalogue 1 and 2 (for an auto-count
        catalogue 2 is catalogue 1). Used for the normalisation.
    n1, n2 : int
        Number of objects in each catalogue.
    los : str
        Line-of-sight convention used ("midpoint", "endpoint", "bisector", or "x"/"y"/"z"
        for a fixed axis in a periodic box).
    box_size : float or None
        Periodic box side in Mpc/h, or None for non-periodic counts.
    region_both, region_one : ndarray of float64, shape (n_regions, n_bins...) or None
        Jackknife: weighted counts of pairs with both members in region k, and with
        exactly one member in region k. Pairs with both members in region k are excluded
        from ``region_one[k]``.
    region_sum_w1, region_sum_w1_sq, region_sum_w2, region_sum_w2_sq : ndarray or None
        Per-region weight sums, shape (n_regions,), for the delete-one normalisations.
    mu_range : {"absolute", "signed"}
        For (s, mu) counts: whether |mu| in [0, 1] or signed mu in [-1, 1] was binned.
    pair_norm : float or None
        Total weighted number of pairs when it is not given by the weight sums, e.g. for an
        RR summed over split random sets (Keihänen et al. 2019): the sum of the per-set
        normalisations. Overrides :attr:`norm` when set.
    region_pair_norm : ndarray of float64, shape (n_regions,), or None
        Delete-one normalisations overriding :meth:`jackknife_norm` (split randoms).
    meta : dict
        Free-form details of the count (number of pairs, work units, ...); JSON-serialisable.
    """

    mode: str
    edges: tuple
    weighted: np.ndarray
    auto: bool
    sum_w1: float
    sum_w1_sq: float
    sum_w2: float
    sum_w2_sq: float
    n1: int
    n2: int
    los: str = "midpoint"
    box_size: float | None = None
    raw: np.ndarray | None = None
    region_both: np.ndarray | None = None
    region_one: np.ndarray | None = None
    region_sum_w1: np.ndarray | None = None
    region_sum_w1_sq: np.ndarray | None = None
    region_sum_w2: np.ndarray | None = None
    region_sum_w2_sq: np.ndarray | None = None
    meta: dict = field(default_factory=dict)
    mu_range: str = "absolute"
    pair_norm: float | None = None
    region_pair_norm: np.ndarray | None = None

    @property
    def n_regions(self) -> int:
        """Number of jackknife regions (0 when counted without labels)."""
        return 0 if self.region_both is None else int(self.region_both.shape[0])

    @property
    def norm(self) -> float:
        """Total weighted number of pairs: [(sum w)^2 - sum w^2]/2 (auto) or sum w1 sum w2."""
        if self.pair_norm is not None:
            return float(self.pair_norm)
        if self.auto:
            return 0.5 * (self.sum_w1**2 - self.sum_w1_sq)
        return self.sum_w1 * self.sum_w2

    def normalised(self) -> np.ndarray:
        """Weighted counts divided by the total weighted number of pairs."""
        return self.weighted / self.norm

    def jackknife_weighted(self, k: int) -> np.ndarray:
        """Weighted counts with region ``k`` deleted (pairs touching k removed)."""
        if self.region_both is None:
            raise ValueError("these counts carry no jackknife regions")
        return self.weighted - self.region_both[k] - self.region_one[k]

    def jackknife_norm(self, k: int) -> float:
        """Total weighted number of pairs with region ``k`` deleted."""
        if self.region_pair_norm is not None:
            return float(self.region_pair_norm[k])
        if self.region_sum_w1 is None:
            raise ValueError("these counts carry no jackknife regions")
        w1 = self.sum_w1 - self.region_sum_w1[k]
        if self.auto:
            return 0.5 * (w1**2 - (self.sum_w1_sq - self.region_sum_w1_sq[k]))
        return w1 * (self.sum_w2 - self.region_sum_w2[k])

    # ------------------------------------------------------------------ storage
    def to_hdf5(self, group) -> None:
        """Store every field in an h5py Group (datasets for arrays, attributes for scalars).

        Parameters
        ----------
        group : h5py.Group
            An empty group (the caller owns the file and its atomic replacement).
        """
        group.attrs["layout"] = _LAYOUT
        group.attrs["layout_version"] = _LAYOUT_VERSION
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name == "edges":
                group.attrs["n_axes"] = len(value)
                for axis, edges in enumerate(value):
                    group.create_dataset(f"edges_{axis}", data=np.asarray(edges, dtype=np.float64))
            elif f.name == "meta":
                group.attrs["meta"] = json.dumps(value, sort_keys=True, default=_json_default)
            elif isinstance(value, np.ndarray):
                group.create_dataset(f.name, data=value)
            elif value is None:
                group.attrs[f"{f.name}_is_none"] = True
            else:
                group.attrs[f.name] = value

    @classmethod
    def from_hdf5(cls, group) -> "PairCounts":
        """Restore counts written by :meth:`to_hdf5`.

        Raises
        ------
        CheckpointError
            The group was not written by :meth:`to_hdf5` or lacks a field.
        """
        from corrpipe.errors import CheckpointError

        name = getattr(group, "name", "?")
        if group.attrs.get("layout") != _LAYOUT:
            raise CheckpointError(f"HDF5 group {name} does not hold pair counts "
                                  f"(layout attribute {group.attrs.get('layout')!r}); recount")
        version = int(group.attrs.get("layout_version", -1))
        if version != _LAYOUT_VERSION:
            raise CheckpointError(f"pair counts in {name} have layout version {version}, this "
                                  f"corrpipe reads version {_LAYOUT_VERSION}; recount")
        values = {}
        try:
            for f in fields(cls):
                if f.name == "edges":
                    n_axes = int(group.attrs["n_axes"])
                    values["edges"] = tuple(group[f"edges_{a}"][()] for a in range(n_axes))
                elif f.name == "meta":
                    values["meta"] = json.loads(group.attrs.get("meta", "{}"))
                elif f.name in group:
                    values[f.name] = group[f.name][()]
                elif group.attrs.get(f"{f.name}_is_none", False):
                    values[f.name] = None
                elif f.name in group.attrs:
                    values[f.name] = _plain(group.attrs[f.name])
        except KeyError as exc:
            raise CheckpointError(f"pair counts in {name} are incomplete ({exc}); recount") from exc
        missing = [f.name for f in fields(cls) if f.name not in values
                   and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING]
        if missing:
            raise CheckpointError(f"pair counts in {name} lack {missing}; recount")
        return cls(**values)


_LAYOUT = "corrpipe-pair-counts"
_LAYOUT_VERSION = 1


def _plain(value):
    """h5py attribute -> plain Python scalar."""
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"cannot store {type(value).__name__} in pair-count metadata")
