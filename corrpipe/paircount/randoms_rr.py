"""Random-random counts without the full N_r^2 cost: split random sets and the periodic-box RR.

Split randoms (Keihänen et al. 2019, A&A 631, A73): the random catalogue is cut into M
subsets of about the data size; RR counts only pairs within each subset, and the
normalisation is the sum of the per-subset pair totals, so RR / norm estimates the same pair
fraction as the full RR at about 1/M of its cost. DR keeps all randoms.

Analytic RR of a periodic box: for points uniform in a box of volume V, the expected weighted
number of pairs in a bin is norm * V_bin / V (common practice), with V_bin the volume of the
bin in separation space (a spherical shell, a shell sector in mu, or a cylindrical annulus
for (r_p, pi) with |pi| counted on both sides).
"""

from __future__ import annotations

import numpy as np

from corrpipe.errors import InputError
from corrpipe.paircount.binning import Binning
from corrpipe.paircount.result import PairCounts

__all__ = ["split_random_rr", "split_indices", "combine_split_counts", "analytic_box_rr",
           "bin_volumes"]


def split_indices(n: int, n_splits: int) -> list:
    """Row indices of ``n_splits`` interleaved subsets of ``n`` rows (row k goes to k mod M).

    Randoms carry no order, so interleaving gives subsets of equal size (to within one row)
    with no random draw needed.
    """
    if int(n_splits) < 1:
        raise InputError(f"n_splits must be a positive integer, got {n_splits}")
    return [np.arange(k, n, int(n_splits)) for k in range(int(n_splits))]


def split_random_rr(random_sets, *, binning: Binning, progress_path=None, **count_options) -> PairCounts:
    """RR summed over several random sets, normalised by the sum of their pair totals.

    Parameters
    ----------
    random_sets : sequence of tuples
        ``(positions, weights)`` or ``(positions, weights, regions)`` per set; positions
        (N_m, 3) in Mpc/h, weights (N_m,) or None.
    binning : Binning
    progress_path : path, optional
        Base name of the progress sidecars; set m uses ``<name>.set<m>``.
    **count_options
        Passed to :func:`corrpipe.paircount.count_pairs` (los, box_size, n_regions, raw, ...).

    Returns
    -------
    PairCounts
        Summed counts with ``pair_norm`` (and ``region_pair_norm`` with labels) set to the sum
        of the per-set normalisations; weight sums and sizes are totals over the sets.

    Notes
    -----
    Keihänen et al. 2019 (A&A 631, A73), split random catalogue: pairs across subsets are
    not counted, and RR is normalised by sum_m [(sum w_m)^2 - sum w_m^2] / 2.
    """
    from corrpipe.paircount.engine import count_pairs

    sets = list(random_sets)
    if not sets:
        raise InputError("split_random_rr needs at least one random set")
    results = []
    for m, entry in enumerate(sets):
        if not isinstance(entry, (tuple, list)) or len(entry) not in (2, 3):
            raise InputError(f"random set {m} must be (positions, weights) or "
                             f"(positions, weights, regions), got {type(entry).__name__}")
        positions, weights = entry[0], entry[1]
        regions = entry[2] if len(entry) == 3 else None
        path = None if progress_path is None else f"{progress_path}.set{m}"
        results.append(count_pairs(positions, weights, binning=binning, regions1=regions,
                                   progress_path=path, **count_options))
    return combine_split_counts(results)


def combine_split_counts(results) -> PairCounts:
    """Sum auto-counts of disjoint random sets (same binning) with the split-random normalisation."""
    first = results[0]
    for m, r in enumerate(results):
        if not r.auto:
            raise InputError(f"split-random set {m} is a cross-count; RR sets must be auto-counts")
        if r.mode != first.mode or any(not np.array_equal(a, b) for a, b in zip(r.edges, first.edges)):
            raise InputError(f"split-random set {m} was counted with other bins than set 0")
        if r.n_regions != first.n_regions:
            raise InputError(f"split-random set {m} has {r.n_regions} jackknife regions, set 0 "
                             f"has {first.n_regions}; label every set with the same regions")

    def total(name):
        values = [getattr(r, name) for r in results]
        if values[0] is None:
            return None
        out = np.zeros_like(np.asarray(values[0]))
        for v in values:
            out = out + v
        return out

    pair_norm = float(sum(r.norm for r in results))
    region_pair_norm = None
    if first.n_regions:
        region_pair_norm = np.array([sum(r.jackknife_norm(k) for r in results)
                                     for k in range(first.n_regions)])
    sum_w = float(sum(r.sum_w1 for r in results))
    sum_w_sq = float(sum(r.sum_w1_sq for r in results))
    meta = {"split_sets": len(results), "n_pairs": int(sum(r.meta.get("n_pairs", 0) for r in results))}
    return PairCounts(
        mode=first.mode, edges=first.edges, weighted=total("weighted"), auto=True,
        sum_w1=sum_w, sum_w1_sq=sum_w_sq, sum_w2=sum_w, sum_w2_sq=sum_w_sq,
        n1=int(sum(r.n1 for r in results)), n2=int(sum(r.n2 for r in results)),
        los=first.los, box_size=first.box_size, raw=total("raw"),
        region_both=total("region_both"), region_one=total("region_one"),
        region_sum_w1=total("region_sum_w1"), region_sum_w1_sq=total("region_sum_w1_sq"),
        region_sum_w2=total("region_sum_w2"), region_sum_w2_sq=total("region_sum_w2_sq"),
        meta=meta, mu_range=first.mu_range, pair_norm=pair_norm, region_pair_norm=region_pair_norm,
    )


def bin_volumes(binning: Binning) -> np.ndarray:
    """Volume of each bin in separation space, (Mpc/h)^3, shape ``binning.shape``.

    Notes
    -----
    s: 4 pi (s_hi^3 - s_lo^3) / 3. (s, mu): the shell times the fraction of solid angle,
    Delta|mu| for |mu| bins and Delta mu / 2 for signed bins. (r_p, pi): pi (r_hi^2 - r_lo^2)
    times 2 Delta pi (both signs of pi). Elementary geometry.
    """
    e0 = binning.edges[0]
    if binning.mode == "rppi":
        annulus = np.pi * np.diff(e0**2)
        return annulus[:, None] * 2.0 * np.diff(binning.edges[1])[None, :]
    shell = 4.0 * np.pi / 3.0 * np.diff(e0**3)
    if binning.mode == "s":
        return shell
    fraction = np.diff(binning.edges[1]) * (1.0 if binning.mu_range == "absolute" else 0.5)
    return shell[:, None] * fraction[None, :]


def analytic_box_rr(binning: Binning, box_size: float, sum_w: float, sum_w_sq: float, n: int,
                    *, los: str = "z") -> PairCounts:
    """Expected RR of a uniform periodic box, no randoms needed.

    Parameters
    ----------
    binning : Binning
    box_size : float
        Box side, Mpc/h. The largest separation must not exceed half of it.
    sum_w, sum_w_sq : float
        Sum of weights and of squared weights of the (virtual) random catalogue; for the
        data-normalised form use the data's sums.
    n : int
        Number of objects.
    los : str
        Fixed-axis line of sight, stored for reference.

    Returns
    -------
    PairCounts
        ``weighted`` = norm * V_bin / V with norm = [(sum w)^2 - sum w^2] / 2.
    """
    box_size = float(box_size)
    if not box_size > 0:
        raise InputError(f"box_size must be positive (Mpc/h), got {box_size}")
    if binning.search_radius > 0.5 * box_size:
        raise InputError(f"largest separation {binning.search_radius:g} Mpc/h exceeds half the box "
                         f"({0.5 * box_size:g} Mpc/h); the analytic RR needs bins that fit the box")
    norm = 0.5 * (sum_w**2 - sum_w_sq)
    weighted = norm * bin_volumes(binning) / box_size**3
    return PairCounts(mode=binning.mode, edges=tuple(e.copy() for e in binning.edges),
                      weighted=weighted, auto=True, sum_w1=float(sum_w), sum_w1_sq=float(sum_w_sq),
                      sum_w2=float(sum_w), sum_w2_sq=float(sum_w_sq), n1=int(n), n2=int(n),
                      los=los, box_size=box_size, mu_range=binning.mu_range,
                      meta={"analytic": True})
