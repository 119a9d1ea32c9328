"""Pair counting in three separate steps: prepare and plan, count work units, reduce.

``count_pairs`` runs the three steps with numba threads. A distributed engine can call the
same steps itself: :func:`prepare_count` once, :func:`count_units` on any subsets of the units
(in any process, in any order) and :func:`reduce_partials` on the results; the reduction sums
partial histograms in unit order, so the result does not depend on how the work was spread.
"""

from __future__ import annotations

import hashlib
import json
import time
from dataclasses import dataclass, field

import numba
import numpy as np

from corrpipe.errors import InputError, StageError
from corrpipe.paircount import kernels
from corrpipe.paircount.binning import Binning
from corrpipe.paircount.grid import Grid, build_grid, neighbour_offsets
from corrpipe.paircount.result import PairCounts

__all__ = [
    "LINES_OF_SIGHT",
    "WorkUnit",
    "PreparedCount",
    "PartialCounts",
    "CountStopped",
    "prepare_count",
    "plan_units",
    "count_units",
    "reduce_partials",
    "count_pairs",
]

LINES_OF_SIGHT = ("midpoint", "endpoint", "bisector", "x", "y", "z")
_LOS_CODE = {name: code for code, name in enumerate(LINES_OF_SIGHT)}
_MODE_CODE = {"s": 0, "smu": 1, "rppi": 2}
_DEFAULT_UNITS = 192
_BATCH_MEMORY = 256 * 2**20  # bytes of per-unit histograms held at once
_VECTOR = True  # use the vectorised (s, |mu|) kernel where it applies
_DEFAULT_BATCH = 8  # fixed, not per thread: the batch partition sets the summation order


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
                digest.update(np.ascontiguousarray(arr).tobytes())
        header = {
            "binning": self.binning.describe(), "los": self.los, "auto": self.auto,
            "box_size": self.box_size, "n_regions": self.n_regions, "raw": self.raw,
            "units": [(u.cell_lo, u.cell_hi) for u in self.units],
            "grid": [self.grid.origin.tolist(), self.grid.side.tolist(),
                     self.grid.shape.tolist()],
        }
        digest.update(json.dumps(header, sort_keys=True).encode())
        return digest.hexdigest()


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
    arr = arr.astype(np.int64)
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
    if regions is not None:
        rsw = np.bincount(regions, weights=weights, minlength=n_regions)
        rsw2 = np.bincount(regions, weights=weights * weights, minlength=n_regions)
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


def prepare_count(positions1, weights1=None, positions2=None, weights2=None, *,
                  binning: Binning, los: str = "midpoint", box_size: float | None = None,
                  regions1=None, regions2=None, n_regions: int | None = None, raw: bool = False,
                  refine: int | None = None, n_units: int = _DEFAULT_UNITS) -> PreparedCount:
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
        # slack of the point-to-cell pruning, far above the rounding of cell assignment
        tol=1e-9 * float(np.max(np.abs(grid.origin)) + np.max(grid.side * grid.shape)),
    )
    return PreparedCount(binning=binning, los=los, auto=auto, box_size=box_size,
                         n_regions=n_regions, raw=bool(raw), grid=grid, cat1=cat1, cat2=cat2,
                         offsets=offsets, kinds=kinds, units=units, kernel_args=kernel_args)


# ---------------------------------------------------------------------------- counting
def _unit_histogram_bytes(prepared: PreparedCount) -> int:
    nflat = prepared.n_flat_bins
    return 8 * nflat * (1 + int(prepared.raw) + 2 * prepared.n_regions)


def count_units(prepared: PreparedCount, unit_ids) -> PartialCounts:
    """Count the given work units (in parallel over numba threads) and sum them in unit order.

    Parameters
    ----------
    prepared : PreparedCount
    unit_ids : sequence of int
        Indices into ``prepared.units``.

    Returns
    -------
    PartialCounts
    """
    ids = np.unique(np.asarray(unit_ids, dtype=np.int64))
    if ids.size and (ids[0] < 0 or ids[-1] >= prepared.n_units):
        raise InputError(f"unit ids must lie in [0, {prepared.n_units}), got {ids.min()}..{ids.max()}")
    nflat = prepared.n_flat_bins
    nreg = prepared.n_regions
    n = ids.size
    lo = np.array([prepared.units[i].cell_lo for i in ids], dtype=np.int64)
    hi = np.array([prepared.units[i].cell_hi for i in ids], dtype=np.int64)
    hist_w = np.zeros((n, nflat))
    hist_raw = np.zeros((n, nflat) if prepared.raw else (n, 0), dtype=np.int64)
    both = np.zeros((n, nreg, nflat) if nreg else (n, 0, 0))
    one = np.zeros_like(both)
    c1, c2 = prepared.cat1, prepared.cat2
    a = prepared.kernel_args
    accepted = kernels.count_unit_batch(
        lo, hi, c1.x, c1.y, c1.z, c1.w, c1.regions, c1.order, c1.start,
        c2.x, c2.y, c2.z, c2.w, c2.regions, c2.order, c2.start,
        a["shape"], a["offsets"], a["kinds"], a["periodic"], a["box"], a["mode"], a["los"],
        a["orient"], a["q_lo"], a["q_hi"], a["lut"], a["q0"], a["lut_scale"], a["e2"],
        a["edges_b"], a["uniform_b"], a["abs_mu"], a["inv_width_b"], a["pi_lo"], a["pi_hi"],
        hist_w, hist_raw, both, one, prepared.raw, nreg > 0, a["max_occupancy"],
        prepared.grid.origin, prepared.grid.side, a["tol"], a["linear_s"] and _VECTOR,
        a["s0"], a["ds"])
    weighted = _ordered_sum(hist_w, nflat)
    raw = _ordered_sum(hist_raw, nflat, np.int64) if prepared.raw else None
    region_both = _ordered_sum(both, (nreg, nflat)) if nreg else None
    region_one = _ordered_sum(one, (nreg, nflat)) if nreg else None
    return PartialCounts(ids, weighted, raw, region_both, region_one, int(accepted.sum()))


def _ordered_sum(stack: np.ndarray, shape, dtype=np.float64) -> np.ndarray:
    """Sum along the first axis strictly in order (reproducible rounding)."""
    total = np.zeros(shape, dtype=dtype)
    for part in stack:
        total += part
    return total


def reduce_partials(prepared: PreparedCount, partials) -> PairCounts:
    """Combine partial counts covering every unit exactly once into a :class:`PairCounts`.

    Partials are summed in the order of their first unit, so the same partition of units gives
    bitwise the same result whatever engine, thread count or interruption produced them.
    """
    parts = sorted(partials, key=lambda p: int(p.unit_ids[0]) if p.unit_ids.size else -1)
    seen = np.concatenate([p.unit_ids for p in parts]) if parts else np.zeros(0, dtype=np.int64)
    if seen.size != prepared.n_units or not np.array_equal(np.sort(seen), np.arange(prepared.n_units)):
        missing = np.setdiff1d(np.arange(prepared.n_units), seen)
        raise StageError(
            f"partial counts do not cover every work unit exactly once: {seen.size} unit results "
            f"for {prepared.n_units} units, {missing.size} missing (first: {missing[:5].tolist()})"
        )
    nflat = prepared.n_flat_bins
    shape = prepared.binning.shape
    weighted = np.zeros(nflat)
    raw = np.zeros(nflat, dtype=np.int64) if prepared.raw else None
    nreg = prepared.n_regions
    both = np.zeros((nreg, nflat)) if nreg else None
    one = np.zeros((nreg, nflat)) if nreg else None
    n_pairs = 0
    for part in parts:
        weighted += part.weighted
        if raw is not None:
            raw += part.raw
        if both is not None:
            both += part.region_both
            one += part.region_one
        n_pairs += part.n_pairs
    c1, c2 = prepared.cat1, prepared.cat2
    return PairCounts(
        mode=prepared.binning.mode,
        edges=tuple(e.copy() for e in prepared.binning.edges),
        weighted=weighted.reshape(shape),
        auto=prepared.auto,
        sum_w1=c1.sum_w, sum_w1_sq=c1.sum_w_sq, sum_w2=c2.sum_w, sum_w2_sq=c2.sum_w_sq,
        n1=c1.n, n2=c2.n, los=prepared.los, box_size=prepared.box_size,
        raw=raw.reshape(shape) if raw is not None else None,
        region_both=both.reshape((nreg,) + shape) if both is not None else None,
        region_one=one.reshape((nreg,) + shape) if one is not None else None,
        region_sum_w1=c1.region_sum_w, region_sum_w1_sq=c1.region_sum_w_sq,
        region_sum_w2=c2.region_sum_w, region_sum_w2_sq=c2.region_sum_w_sq,
        mu_range=prepared.binning.mu_range,
        meta={"n_pairs": n_pairs, "n_units": prepared.n_units},
    )


def count_pairs(positions1, weights1=None, positions2=None, weights2=None, *,
                binning: Binning, los: str = "midpoint", box_size: float | None = None,
                regions1=None, regions2=None, n_regions: int | None = None, raw: bool = False,
                n_threads: int | None = None, progress: bool = False,
                progress_path=None, units_per_batch: int | None = None,
                n_units: int = _DEFAULT_UNITS, refine: int | None = None,
                stop_after_units: int | None = None) -> PairCounts:
    """Weighted pair counts of one catalogue (auto) or two catalogues (cross).

    Parameters
    ----------
    positions1 : array_like, shape (N1, 3)
        Cartesian positions, Mpc/h (observer at the origin for survey data; inside
        [0, box_size) for a periodic box, other values are wrapped).
    weights1 : array_like, shape (N1,), optional
        Per-object weights (default 1).
    positions2, weights2 : optional
        Second catalogue for a cross-count; omit both for an auto-count, which counts each
        distinct pair once.
    binning : Binning
        Bins (s, (s, mu) or (r_p, pi)); separations in Mpc/h.
    los : {"midpoint", "endpoint", "bisector", "x", "y", "z"}
        Line of sight. midpoint: l = (x1 + x2)/2; endpoint: l = x1 (the catalogue-1 member of
        a cross pair; in an auto pair the member with the smaller input row); bisector:
        l = x1/|x1| + x2/|x2|; "x"/"y"/"z": a fixed axis (plane-parallel; required for a box).
    box_size : float, optional
        Periodic box side, Mpc/h; separations use the minimum image.
    regions1, regions2 : array_like of int, optional
        Jackknife region labels in [0, n_regions).
    n_regions : int, optional
        Number of regions (default: largest label + 1).
    raw : bool
        Also return unweighted int64 pair counts.
    n_threads : int, optional
        numba threads for this call (default: all); restored afterwards.
    progress : bool
        Show a progress bar (units done, pairs per second).
    progress_path : path, optional
        HDF5 sidecar: finished units are saved there and a rerun with the same inputs resumes.
    units_per_batch : int, optional
        Units counted in parallel between two sidecar writes (default 8, fewer if their
        histograms would exceed 256 MiB). Results are bitwise reproducible for a given batch
        size whatever the thread count or interruptions; other batch sizes change only the
        summation order (differences ~1e-16 relative).
    n_units : int
        Target number of work units.
    refine : int, optional
        Cells per search radius along an axis (default chosen from the density).
    stop_after_units : int, optional
        Stop with :class:`CountStopped` once at least this many units are done in this call
        (for tests and controlled interruptions).

    Returns
    -------
    PairCounts

    Raises
    ------
    InputError
        Invalid positions, weights, labels or geometry.
    CheckpointError
        The progress sidecar cannot be written.
    CountStopped
        ``stop_after_units`` was reached.

    Notes
    -----
    The sign of mu (``mu_range="signed"``) and pi follows d = x2 - x1 projected on the line of
    sight; in an auto-count x1 is the member with the smaller input row. A pair falls in s bin
    k when s_k^2 <= s^2 < s_{k+1}^2; mu bins are half-open except the last, which includes its
    upper edge. Jackknife arrays follow the delete-one scheme (common practice, e.g. Mohammad
    & Percival 2022): ``region_both[k]`` holds pairs with both members in k and
    ``region_one[k]`` pairs with exactly one member in k.
    """
    from corrpipe.paircount.progress import ProgressSidecar  # local: keeps h5py out of workers

    prepared = prepare_count(positions1, weights1, positions2, weights2, binning=binning, los=los,
                             box_size=box_size, regions1=regions1, regions2=regions2,
                             n_regions=n_regions, raw=raw, refine=refine, n_units=n_units)
    previous_threads = numba.get_num_threads()
    threads = numba.config.NUMBA_NUM_THREADS if n_threads is None else int(n_threads)
    if not 1 <= threads <= numba.config.NUMBA_NUM_THREADS:
        raise InputError(
            f"n_threads must be between 1 and {numba.config.NUMBA_NUM_THREADS}, got {n_threads}"
        )
    if units_per_batch is None:
        units_per_batch = _DEFAULT_BATCH
    units_per_batch = max(1, min(int(units_per_batch),
                                 _BATCH_MEMORY // max(1, _unit_histogram_bytes(prepared))))

    sidecar = ProgressSidecar(progress_path, prepared) if progress_path is not None else None
    partials = sidecar.load() if sidecar is not None else []
    done = set(int(u) for p in partials for u in p.unit_ids)
    todo = [u.index for u in prepared.units if u.index not in done]
    batches = [todo[i:i + units_per_batch] for i in range(0, len(todo), units_per_batch)]

    from tqdm.auto import tqdm

    bar = tqdm(total=prepared.n_units, initial=len(done), unit="unit", disable=not progress,
               desc=f"pairs {'auto' if prepared.auto else 'cross'}", leave=False)
    started = time.perf_counter()
    pairs_here = 0
    units_here = 0
    try:
        numba.set_num_threads(threads)
        for batch in batches:
            part = count_units(prepared, batch)
            if sidecar is not None:
                sidecar.save(part)
            partials.append(part)
            pairs_here += part.n_pairs
            units_here += len(batch)
            elapsed = max(time.perf_counter() - started, 1e-9)
            bar.update(len(batch))
            bar.set_postfix_str(f"{pairs_here / elapsed:.3g} pairs/s", refresh=False)
            if stop_after_units is not None and units_here >= stop_after_units and \
                    len(done) + units_here < prepared.n_units:
                raise CountStopped(
                    f"pair count stopped after {units_here} work units as requested "
                    f"({len(done) + units_here} of {prepared.n_units} done); call again with "
                    "the same progress_path to resume"
                )
    finally:
        numba.set_num_threads(previous_threads)
        bar.close()
    return reduce_partials(prepared, partials)
