"""Work units of a pair count and the partial histograms counted for them.

A count is cut into work units (ranges of catalogue-1 cells, see :func:`plan_units`); any
engine counts some of them into :class:`PartialCounts`, and the reduction sums partials in unit
order. This module holds those shared types so that the counter, the resumable sidecar and the
distributed engine all import them from one place.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from corrpipe.errors import StageError
from corrpipe.paircount import kernels
from corrpipe.paircount.grid import Grid

__all__ = ["CountStopped", "WorkUnit", "PartialCounts", "plan_units"]


class CountStopped(StageError):
    """A count stopped on request (``stop_after_units``); its finished units are in the sidecar."""


@dataclass(frozen=True)
class WorkUnit:
    """An independent piece of a count: all pairs of catalogue-1 cells ``cell_lo <= c < cell_hi``.

    Parameters
    ----------
    index : int
        Position of the unit in the plan (the reduction order).
    cell_lo, cell_hi : int
        Range of catalogue-1 cells.
    cost : float
        Estimated number of candidate pairs (for scheduling only).
    """

    index: int
    cell_lo: int
    cell_hi: int
    cost: float



@dataclass(frozen=True)
class PartialCounts:
    """Summed histograms of some work units (flat bin axis).

    Parameters
    ----------
    unit_ids : ndarray of int64
        Units included, in increasing order.
    weighted : ndarray of float64, shape (n_flat_bins,)
    raw : ndarray of int64 or None
    region_both, region_one : ndarray of float64, shape (n_regions, n_flat_bins) or None
    n_pairs : int
        Number of pairs counted.
    """

    unit_ids: np.ndarray
    weighted: np.ndarray
    raw: np.ndarray | None
    region_both: np.ndarray | None
    region_one: np.ndarray | None
    n_pairs: int



def plan_units(start1: np.ndarray, start2: np.ndarray, grid: Grid, offsets: np.ndarray,
               kinds: np.ndarray, n_units: int) -> tuple:
    """Cut a count into about ``n_units`` work units of similar estimated cost.

    Units are contiguous ranges of catalogue-1 cells; the plan depends only on the cell
    occupancies, never on the machine or the thread count.

    Returns
    -------
    tuple of WorkUnit
    """
    cost = kernels.cell_pair_costs(start1, start2, grid.shape, offsets, kinds, grid.periodic)
    nonempty = np.flatnonzero(cost > 0)
    if nonempty.size == 0:
        return ()
    n_units = max(1, min(int(n_units), nonempty.size))
    cumulative = np.cumsum(cost)
    total = cumulative[-1]
    targets = total * np.arange(1, n_units) / n_units
    cuts = np.searchsorted(cumulative, targets, side="left") + 1
    bounds = np.unique(np.concatenate(([nonempty[0]], cuts, [nonempty[-1] + 1])))
    bounds = bounds[(bounds >= nonempty[0]) & (bounds <= nonempty[-1] + 1)]
    units = []
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        unit_cost = float(cumulative[hi - 1] - (cumulative[lo - 1] if lo > 0 else 0.0))
        if unit_cost > 0:
            units.append(WorkUnit(len(units), int(lo), int(hi), unit_cost))
    return tuple(units)
