"""Cell lists: a regular grid over the bounding box (or the periodic box) and its cell-pair offsets.

The grid has cells of side about ``r / refine`` where ``r`` is the largest separation counted.
Points are sorted by cell into contiguous arrays (see :func:`corrpipe.paircount.kernels.sort_into_cells`).
Neighbour cells are visited through a list of offsets, pruned once by the minimum distance any
two points of the two cells can have, so no per-pair work is spent on cells that are too far.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import product

import numpy as np

__all__ = ["Grid", "build_grid", "neighbour_offsets"]

# A little slack so that rounding of cell assignments never prunes a pair that is in range.
_SLACK = 1e-9


@dataclass(frozen=True)
class Grid:
    """A regular grid of cells.

    Parameters
    ----------
    origin : ndarray, shape (3,)
        Lower corner, Mpc/h.
    side : ndarray, shape (3,)
        Cell side along each axis, Mpc/h.
    shape : ndarray of int64, shape (3,)
        Number of cells along each axis.
    box_size : float or None
        Periodic box side (Mpc/h), None for a non-periodic grid.
    """

    origin: np.ndarray
    side: np.ndarray
    shape: np.ndarray
    box_size: float | None

    @property
    def n_cells(self) -> int:
        """Total number of cells."""
        return int(np.prod(self.shape))

    @property
    def periodic(self) -> bool:
        """True for a periodic box."""
        return self.box_size is not None


def build_grid(positions: list, radius: float, box_size: float | None, refine: int,
               max_cells: int) -> Grid:
    """Grid of cells of side >= radius / refine covering all ``positions`` arrays.

    Parameters
    ----------
    positions : list of ndarray, each (N, 3)
        Catalogues to cover, Mpc/h.
    radius : float
        Largest separation counted, Mpc/h.
    box_size : float or None
        Periodic box side, Mpc/h.
    refine : int
        Cells per ``radius`` along each axis (1 = cells of side ``radius``).
    max_cells : int
        Upper bound on the number of cells (coarsens the grid for sparse catalogues).
    """
    target = radius / refine
    if box_size is not None:
        origin = np.zeros(3)
        extent = np.full(3, float(box_size))
    else:
        nonempty = [p for p in positions if p.shape[0] > 0]
        if nonempty:
            lo = np.min([p.min(axis=0) for p in nonempty], axis=0)
            hi = np.max([p.max(axis=0) for p in nonempty], axis=0)
        else:
            lo = hi = np.zeros(3)
        origin = lo.astype(np.float64)
        extent = (hi - lo).astype(np.float64)
    shape = np.maximum(1, np.floor(extent / target)).astype(np.int64)
    while int(np.prod(shape)) > max_cells:
        factor = (np.prod(shape) / max_cells) ** (1.0 / 3.0)
        shape = np.maximum(1, np.floor(shape / max(factor, 1.0001))).astype(np.int64)
    side = np.where(extent > 0, extent / shape, 1.0)
    return Grid(origin=origin, side=side, shape=shape, box_size=box_size)


def neighbour_offsets(grid: Grid, r_max: float, r_min: float, auto: bool):
    """Cell offsets to visit and their kind, pruned by the distance between cells.

    Returns
    -------
    offsets : ndarray of int64, shape (n_offsets, 3)
        Offsets in cells (residues modulo the grid shape for a periodic grid).
    kinds : ndarray of int64, shape (n_offsets,)
        0 ordinary; 1 same cell (auto-count, pairs j > i); 2 periodic offset equal to its own
        negative (visit the cell pair once, when c2 > c1).

    Notes
    -----
    For an auto-count each unordered pair of cells is visited once: of an offset and its
    negative only the lexicographically larger is kept. Two cells ``g`` cells apart along an
    axis hold points at least ``(g - 1) * side`` apart along that axis (common practice).
    """
    shape = grid.shape
    side = grid.side
    reach = np.floor(r_max / side).astype(np.int64) + 1
    per_axis = []
    for axis in range(3):
        n = int(shape[axis])
        if grid.periodic:
            if 2 * reach[axis] + 1 >= n:
                residues = np.arange(n)
            else:
                residues = np.arange(-reach[axis], reach[axis] + 1) % n
            gaps = np.minimum(residues, n - residues)
        else:
            k = min(int(reach[axis]), n - 1)
            residues = np.arange(-k, k + 1)
            gaps = np.abs(residues)
        per_axis.append((residues, gaps))

    offsets, kinds = [], []
    r2_max = (r_max * (1 + _SLACK)) ** 2
    r2_min = (r_min * (1 - _SLACK)) ** 2
    for (ox, gx), (oy, gy), (oz, gz) in product(*[zip(*pa) for pa in per_axis]):
        gaps = np.array([gx, gy, gz], dtype=np.float64)
        near = np.sum((np.maximum(gaps - 1, 0) * side) ** 2)
        far = np.sum(((gaps + 1) * side) ** 2)
        if near >= r2_max or (r_min > 0 and far < r2_min):
            continue
        off = (int(ox), int(oy), int(oz))
        if not auto:
            offsets.append(off)
            kinds.append(0)
            continue
        if grid.periodic:
            neg = tuple(int((-o) % n) for o, n in zip(off, shape))
        else:
            neg = tuple(-o for o in off)
        if off == (0, 0, 0) or (grid.periodic and all(o % n == 0 for o, n in zip(off, shape))):
            offsets.append(off)
            kinds.append(1)
        elif off == neg:
            offsets.append(off)
            kinds.append(2)
        elif off > neg:
            offsets.append(off)
            kinds.append(0)
    if not offsets:
        return np.zeros((0, 3), dtype=np.int64), np.zeros(0, dtype=np.int64)
    offsets = np.asarray(offsets, dtype=np.int64)
    kinds = np.asarray(kinds, dtype=np.int64)
    return offsets, kinds
