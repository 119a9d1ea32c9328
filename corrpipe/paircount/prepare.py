"""Preparing a pair count: validate the inputs, sort them into cells, plan the work units.

:func:`prepare_count` returns a :class:`PreparedCount`, plain picklable arrays that any worker
can count from (:mod:`corrpipe.paircount.engine`).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field

import numpy as np

from corrpipe.errors import InputError
from corrpipe.paircount import kernels
from corrpipe.paircount.binning import Binning
from corrpipe.paircount.grid import Grid, build_grid, neighbour_offsets
from corrpipe.paircount.units import plan_units

__all__ = ["LINES_OF_SIGHT", "PreparedCount", "prepare_count"]

LINES_OF_SIGHT = ("midpoint", "endpoint", "bisector", "x", "y", "z")
_LOS_CODE = {name: code for code, name in enumerate(LINES_OF_SIGHT)}
_MODE_CODE = {"s": 0, "smu": 1, "rppi": 2}
DEFAULT_UNITS = 192


@dataclass(frozen=True)
class _Sorted:
    """One catalogue sorted by cell, as the kernels want it."""

    x: np.ndarray
    y: np.ndarray
    z: np.ndarray
    w: np.ndarray
    regions: np.ndarray  # int32, empty when no labels
    order: np.ndarray    # original index (int64), empty unless the pair orientation matters
    start: np.ndarray    # first sorted index of each cell, length n_cells + 1
    n: int
    sum_w: float
    sum_w_sq: float
    region_sum_w: np.ndarray | None
    region_sum_w_sq: np.ndarray | None


@dataclass(frozen=True)
class PreparedCount:
    """Everything a worker needs to count any work unit (picklable, plain arrays).

    Build it with :func:`prepare_count`.
    """

    binning: Binning
    los: str
    auto: bool
    box_size: float | None
    n_regions: int
    raw: bool
    grid: Grid
    cat1: _Sorted
    cat2: _Sorted
    offsets: np.ndarray
    kinds: np.ndarray
    units: tuple
    kernel_args: dict = field(repr=False)

    @property
    def n_units(self) -> int:
        """Number of work units in the plan."""
        return len(self.units)

    @property
    def n_flat_bins(self) -> int:
        """Number of histogram bins (product of the binning shape)."""
        return int(np.prod(self.binning.shape))

    def fingerprint(self) -> str:
        """Hash of the inputs, binning, line of sight and plan (identifies a resumable count)."""
        digest = hashlib.sha256()
        for cat in (self.cat1, self.cat2):
            for arr in (cat.x, cat.y, cat.z, cat.w, cat.regions, cat.start):
                digest.update(np.ascontiguousarray(arr).data)  # the bytes, without a copy
        header = {
            "binning": self.binning.describe(), "los": self.los, "auto": self.auto,
            "box_size": self.box_size, "n_regions": self.n_regions, "raw": self.raw,
            "units": [(u.cell_lo, u.cell_hi) for u in self.units],
            "grid": [self.grid.origin.tolist(), self.grid.side.tolist(),
                     self.grid.shape.tolist()],
        }
        digest.update(json.dumps(header, sort_keys=True).encode())
        return digest.hexdigest()



# ---------------------------------------------------------------------------- validation
def _check_positions(positions, name: str) -> np.ndarray:
    try:
        arr = np.asarray(positions, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a numeric (N, 3) array of positions in Mpc/h") from exc
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(
            f"{name} must have shape (N, 3) (x, y, z in Mpc/h), got shape {arr.shape}; "
            "stack the coordinates with numpy.column_stack"
        )
    if np.isfinite(np.sum(arr)):  # cheap check without an (N, 3) temporary
        return arr
    bad = ~np.all(np.isfinite(arr), axis=1)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{name} has {int(bad.sum())} of {arr.shape[0]} rows with NaN or infinite "
            f"coordinates (first at row {first}); remove them before counting"
        )
    return arr


def _check_weights(weights, n: int, name: str) -> np.ndarray:
    if weights is None:
        return np.ones(n)
    try:
        arr = np.asarray(weights, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a numeric array of length {n}") from exc
    if arr.shape != (n,):
        raise InputError(f"{name} must have shape ({n},) to match the positions, got {arr.shape}")
    if np.isfinite(np.sum(arr)):
        return arr
    bad = ~np.isfinite(arr)
    if bad.any():
        raise InputError(
            f"{name} has {int(bad.sum())} NaN or infinite values (first at row "
            f"{int(np.flatnonzero(bad)[0])}); fix or drop those objects"
        )
    return arr


def _check_regions(regions, n: int, n_regions: int, name: str) -> np.ndarray:
    arr = np.asarray(regions)
    if arr.shape != (n,):
        raise InputError(f"{name} must have shape ({n},) to match the positions, got {arr.shape}")
    if n and not np.issubdtype(arr.dtype, np.integer):
        if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise InputError(f"{name} must hold integer region labels, got dtype {arr.dtype}")
    arr = arr.astype(np.int64, copy=False)  # no copy of int64 labels
    if n and (arr.min() < 0 or arr.max() >= n_regions):
        bad = int(np.count_nonzero((arr < 0) | (arr >= n_regions)))
        raise InputError(
            f"{name} must lie in [0, {n_regions}) (n_regions={n_regions}); {bad} labels are "
            f"outside (range found: {arr.min()}..{arr.max()})"
        )
    return arr


# ---------------------------------------------------------------------------- preparation
def _sort_catalogue(pos, weights, regions, grid: Grid, n_regions: int, keep_order: bool) -> _Sorted:
    inv_side = 1.0 / grid.side
    box = float(grid.box_size) if grid.periodic else 0.0
    counts = kernels.cell_of_points(pos, grid.origin, inv_side, grid.shape, box)
    start = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=start[1:])
    n = pos.shape[0]
    xs, ys, zs, ws = (np.empty(n) for _ in range(4))
    rs = np.empty(n if regions is not None else 0, dtype=np.int32)
    order = np.empty(n if keep_order else 0, dtype=np.int64)
    reg_in = regions if regions is not None else np.zeros(0, dtype=np.int64)
    kernels.sort_into_cells(pos, weights, reg_in, grid.origin, inv_side, grid.shape, box, start,
                            xs, ys, zs, ws, rs, order)
    # z order inside each cell lets the vector kernel bisect a z window per point
    kernels.sort_cells_by_z(start, xs, ys, zs, ws, rs, order)
    if regions is not None:
        # in input order like numpy.bincount, without an (N,) temporary of squared weights
        rsw, rsw2 = kernels.region_weight_sums(regions, weights, n_regions)
    else:
        rsw = rsw2 = None
    return _Sorted(xs, ys, zs, ws, rs, order, start, n, float(np.sum(weights)),
                   float(np.dot(weights, weights)), rsw, rsw2)


def _auto_refine(n_points: int, volume: float, radius: float) -> int:
    """Cells per search radius: finer cells pay while they still hold a few points each."""
    if volume <= 0 or n_points == 0:
        return 1
    density = n_points / volume
    # measured with scripts/bench_paircount.py-like inputs: with point-to-cell pruning,
    # cells of radius/2 beat radius/3 until cells of radius/3 hold ~50 points
    if density * (radius / 3) ** 3 >= 50.0:
        return 3
    if density * (radius / 2) ** 3 >= 4.0:
        return 2
    return 1


def _lookup_table(edges: np.ndarray):
    """Table from a squared separation to a first guess of its bin (corrected exactly later)."""
    n_bins = edges.size - 1
    e2 = edges * edges
    span = e2[-1] - e2[0]
    n_lut = int(min(max(4 * n_bins, np.ceil(2 * span / np.diff(e2).min())), 16384))
    scale = n_lut / span
    values = e2[0] + np.arange(n_lut) / scale
    lut = np.clip(np.searchsorted(e2, values, side="right") - 1, 0, n_bins - 1).astype(np.int64)
    return lut, float(e2[0]), float(scale)


def _arithmetic_edges(edges: np.ndarray):
    """``(start, step)`` when every edge but the last is exactly ``start + k * step`` in float64
    (as the kernels recompute them), else None. The last edge only bounds the range."""
    n = edges.size - 1
    start = float(edges[0])
    step = float((edges[-1] - edges[0]) / n)
    if not step > 0:
        return None
    recomputed = np.arange(n, dtype=np.float64) * step + start
    if not np.array_equal(recomputed, edges[:-1]):
        return None
    return start, step



def prepare_count(positions1, weights1=None, positions2=None, weights2=None, *,
                  binning: Binning, los: str = "midpoint", box_size: float | None = None,
                  regions1=None, regions2=None, n_regions: int | None = None, raw: bool = False,
                  refine: int | None = None, n_units: int = DEFAULT_UNITS) -> PreparedCount:
    """Validate the inputs, sort them into cells and plan the work units.

    Parameters are those of :func:`count_pairs`. ``refine`` is the number of cells per search
    radius along an axis (None chooses from the density); ``n_units`` the target number of
    work units.

    Returns
    -------
    PreparedCount
    """
    if not isinstance(binning, Binning):
        raise InputError(f"binning must be a corrpipe.paircount.Binning, got {type(binning).__name__}")
    if los not in LINES_OF_SIGHT:
        raise InputError(f"line of sight must be one of {LINES_OF_SIGHT}, got {los!r}")
    pos1 = _check_positions(positions1, "positions1")
    w1 = _check_weights(weights1, pos1.shape[0], "weights1")
    auto = positions2 is None
    if auto:
        if weights2 is not None or regions2 is not None:
            raise InputError("weights2/regions2 were given without positions2; pass positions2 "
                             "for a cross-count, or drop them for an auto-count")
        pos2, w2 = pos1, w1
    else:
        pos2 = _check_positions(positions2, "positions2")
        w2 = _check_weights(weights2, pos2.shape[0], "weights2")

    if box_size is not None:
        box_size = float(box_size)
        if not (np.isfinite(box_size) and box_size > 0):
            raise InputError(f"box_size must be a positive length in Mpc/h, got {box_size}")
        if binning.search_radius > 0.5 * box_size:
            raise InputError(
                f"largest separation {binning.search_radius:g} Mpc/h exceeds half the periodic box "
                f"({0.5 * box_size:g} Mpc/h); minimum-image pairs are ambiguous. Lower the "
                "maximum separation or use a larger box"
            )
        if binning.mode != "s" and los not in ("x", "y", "z"):
            raise InputError(
                f"a periodic box needs a fixed-axis line of sight ('x', 'y' or 'z'), got {los!r}"
            )

    with_regions = regions1 is not None or regions2 is not None
    if with_regions:
        if regions1 is None or (not auto and regions2 is None):
            raise InputError("region labels must be given for both catalogues of a cross-count "
                             "(regions1 and regions2), or for neither")
        if n_regions is None:
            found = [np.asarray(r) for r in (regions1, regions2) if r is not None]
            n_regions = int(max((int(f.max()) + 1 if f.size else 0) for f in found))
            n_regions = max(n_regions, 1)
        n_regions = int(n_regions)
        if n_regions < 1:
            raise InputError(f"n_regions must be at least 1, got {n_regions}")
        reg1 = _check_regions(regions1, pos1.shape[0], n_regions, "regions1")
        reg2 = reg1 if auto else _check_regions(regions2, pos2.shape[0], n_regions, "regions2")
    else:
        n_regions = 0
        reg1 = reg2 = None

    radius = binning.search_radius
    cats = [pos1] if auto else [pos1, pos2]
    n_total = sum(p.shape[0] for p in cats)
    if refine is None:
        if box_size is not None:
            volume = box_size**3
        else:
            nonempty = [p for p in cats if p.shape[0]]
            volume = 0.0
            if nonempty:
                ext = (np.max([p.max(0) for p in nonempty], 0) - np.min([p.min(0) for p in nonempty], 0))
                volume = float(np.prod(np.maximum(ext, radius)))
        refine = _auto_refine(max(p.shape[0] for p in cats), volume, radius)
    grid = build_grid(cats, radius, box_size, int(refine), max_cells=max(64, 2 * n_total))
    offsets, kinds = neighbour_offsets(grid, radius, binning.min_radius, auto)

    mu_signed = binning.mode == "smu" and binning.mu_range == "signed"
    orient = auto and binning.mode != "s" and (mu_signed or los == "endpoint")
    cat1 = _sort_catalogue(pos1, w1, reg1, grid, n_regions, orient)
    cat2 = cat1 if auto else _sort_catalogue(pos2, w2, reg2, grid, n_regions, False)
    units = plan_units(cat1.start, cat2.start, grid, offsets, kinds, n_units)

    first = binning.edges[0]
    lut, q0, lut_scale = _lookup_table(first)
    if binning.mode == "s":
        edges_b = np.array([0.0, 1.0])
    else:
        edges_b = binning.edges[1]
    widths_b = np.diff(edges_b)
    uniform_b = bool(np.allclose(widths_b, widths_b[0], rtol=1e-12, atol=0.0))
    pi_lo, pi_hi = (float(edges_b[0]), float(edges_b[-1])) if binning.mode == "rppi" else (0.0, 0.0)
    s_arith = _arithmetic_edges(first)
    mu_arith = _arithmetic_edges(edges_b) if binning.mode == "smu" else None
    linear_s = (s_arith is not None and mu_arith is not None and mu_arith[0] == 0.0
                and float(edges_b[-1]) == 1.0 and mu_arith[1] == 1.0 / (edges_b.size - 1))
    s0, ds = s_arith if s_arith is not None else (0.0, 1.0)
    kernel_args = dict(
        shape=grid.shape, offsets=offsets, kinds=kinds, periodic=grid.periodic,
        box=float(box_size) if box_size is not None else 0.0, mode=_MODE_CODE[binning.mode],
        los=_LOS_CODE[los], orient=orient,
        q_lo=binning.min_radius**2, q_hi=radius**2,
        lut=lut, q0=q0, lut_scale=lut_scale, e2=first * first,
        linear_s=linear_s, s0=s0, ds=ds,
        edges_b=np.ascontiguousarray(edges_b), uniform_b=uniform_b,
        abs_mu=not mu_signed, inv_width_b=float(1.0 / widths_b[0]),
        pi_lo=pi_lo, pi_hi=pi_hi,
        max_occupancy=int(np.diff(cat2.start).max(initial=0)) + 1,
        cell_region2=(kernels.cell_regions(cat2.start, cat2.regions) if n_regions
                      else np.zeros(0, dtype=np.int32)),
        # slack of the point-to-cell pruning, far above the rounding of cell assignment
        tol=1e-9 * float(np.max(np.abs(grid.origin)) + np.max(grid.side * grid.shape)),
    )
    return PreparedCount(binning=binning, los=los, auto=auto, box_size=box_size,
                         n_regions=n_regions, raw=bool(raw), grid=grid, cat1=cat1, cat2=cat2,
                         offsets=offsets, kinds=kinds, units=units, kernel_args=kernel_args)
