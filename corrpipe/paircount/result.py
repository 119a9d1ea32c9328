"""The result type of a pair count: the contract between the counter and the estimators."""

from __future__ import annotations

from dataclasses import dataclass, field

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

    @property
    def n_regions(self) -> int:
        """Number of jackknife regions (0 when counted without labels)."""
        return 0 if self.region_both is None else int(self.region_both.shape[0])

    @property
    def norm(self) -> float:
        """Total weighted number of pairs: [(sum w)^2 - sum w^2]/2 (auto) or sum w1 sum w2."""
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
        if self.region_sum_w1 is None:
            raise ValueError("these counts carry no jackknife regions")
        w1 = self.sum_w1 - self.region_sum_w1[k]
        if self.auto:
            return 0.5 * (w1**2 - (self.sum_w1_sq - self.region_sum_w1_sq[k]))
        return w1 * (self.sum_w2 - self.region_sum_w2[k])
