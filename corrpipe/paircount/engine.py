"""Pair counting in three separate steps: prepare and plan, count work units, reduce.

``count_pairs`` runs the three steps with numba threads. A distributed engine can call the
same steps itself: :func:`prepare_count` once, :func:`count_units` on any subsets of the units
(in any process, in any order) and :func:`reduce_partials` on the results; the reduction sums
partial histograms in unit order, so the result does not depend on how the work was spread.
"""

from __future__ import annotations

import time

import numba
import numpy as np

from corrpipe.errors import InputError, StageError
from corrpipe.paircount import kernels
from corrpipe.paircount.binning import Binning
from corrpipe.paircount.prepare import DEFAULT_UNITS, LINES_OF_SIGHT, PreparedCount, prepare_count
from corrpipe.paircount.result import PairCounts
from corrpipe.paircount.units import CountStopped, PartialCounts, WorkUnit, plan_units
from corrpipe.terminal import show_bars

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
    "OrderedReduction",
]

_BATCH_MEMORY = 256 * 2**20  # bytes of per-unit histograms held at once
_VECTOR = True  # use the vectorised (s, |mu|) kernel where it applies
_DEFAULT_BATCH = 8  # fixed, not per thread: the batch partition sets the summation order


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
    # region rows are zeroed by the kernel on first use (a unit touches few regions), so
    # untouched rows cost neither time nor resident memory
    regs = (np.empty((n, 2 * nreg + 1, nflat + kernels.N_SPARE)) if nreg
            else np.zeros((n, 1, 1)))
    touched = np.zeros((n, nreg), dtype=np.bool_)
    c1, c2 = prepared.cat1, prepared.cat2
    a = prepared.kernel_args
    accepted = kernels.count_unit_batch(
        lo, hi, c1.x, c1.y, c1.z, c1.w, c1.regions, c1.order, c1.start,
        c2.x, c2.y, c2.z, c2.w, c2.regions, c2.order, c2.start,
        a["shape"], a["offsets"], a["kinds"], a["periodic"], a["box"], a["mode"], a["los"],
        a["orient"], a["q_lo"], a["q_hi"], a["lut"], a["q0"], a["lut_scale"], a["e2"],
        a["edges_b"], a["uniform_b"], a["abs_mu"], a["inv_width_b"], a["pi_lo"], a["pi_hi"],
        hist_w, hist_raw, regs, touched, a["cell_region2"], prepared.raw, nreg > 0,
        a["max_occupancy"], prepared.grid.origin, prepared.grid.side, a["tol"],
        a["linear_s"] and _VECTOR, a["s0"], a["ds"])
    weighted = _ordered_sum(hist_w, nflat)
    raw = _ordered_sum(hist_raw, nflat, np.int64) if prepared.raw else None
    region_both = _ordered_region_sum(regs, touched, nflat, 0) if nreg else None
    region_one = _ordered_region_sum(regs, touched, nflat, nreg) if nreg else None
    return PartialCounts(ids, weighted, raw, region_both, region_one, int(accepted.sum()))


def _ordered_sum(stack: np.ndarray, shape, dtype=np.float64) -> np.ndarray:
    """Sum along the first axis strictly in order (reproducible rounding)."""
    total = np.zeros(shape, dtype=dtype)
    for part in stack:
        total += part
    return total


def _ordered_region_sum(stack: np.ndarray, touched: np.ndarray, nflat: int,
                        first_row: int) -> np.ndarray:
    """Sum the touched region rows (``first_row + region``) of per-unit histograms in unit order.

    Skipping an untouched row equals adding its zeros, so the result is bitwise that of a sum
    over dense rows; the spare columns (kernel scratch) are dropped.
    """
    total = np.zeros((touched.shape[1], nflat))
    for u in range(stack.shape[0]):
        rows = np.flatnonzero(touched[u])
        if rows.size:
            total[rows] += stack[u, first_row + rows, :nflat]
    return total


def _first_unit(part: PartialCounts) -> int:
    return int(part.unit_ids[0]) if part.unit_ids.size else -1


class OrderedReduction:
    """Running sum of partial counts, added strictly in the order of their first unit.

    Partials may arrive in any order; each is held only until all partials before it have been
    added, then summed and dropped, so a count keeps one result's histograms (plus any early
    arrivals) instead of every partial. The sum is bitwise that of :func:`reduce_partials`.

    Parameters
    ----------
    prepared : PreparedCount
    first_units : iterable of int
        First unit id of every partial that will be added (fixes the order).
    """

    def __init__(self, prepared: PreparedCount, first_units) -> None:
        self.prepared = prepared
        self._order = sorted(int(k) for k in first_units)
        self._next = 0
        self._pending: dict = {}
        self._ids: list = []
        nflat = prepared.n_flat_bins
        nreg = prepared.n_regions
        self.weighted = np.zeros(nflat)
        self.raw = np.zeros(nflat, dtype=np.int64) if prepared.raw else None
        self.both = np.zeros((nreg, nflat)) if nreg else None
        self.one = np.zeros((nreg, nflat)) if nreg else None
        self.n_pairs = 0

    def add(self, part: PartialCounts) -> None:
        """Hold ``part`` and add every partial whose predecessors are all in."""
        self._pending[_first_unit(part)] = part
        while self._next < len(self._order) and self._order[self._next] in self._pending:
            ready = self._pending.pop(self._order[self._next])
            self._next += 1
            self.weighted += ready.weighted
            if self.raw is not None:
                self.raw += ready.raw
            if self.both is not None:
                self.both += ready.region_both
                self.one += ready.region_one
            self.n_pairs += ready.n_pairs
            self._ids.append(ready.unit_ids)

    def result(self) -> PairCounts:
        """The summed counts; raises StageError unless every unit was added exactly once."""
        prepared = self.prepared
        seen = np.concatenate(self._ids) if self._ids else np.zeros(0, dtype=np.int64)
        if (self._pending or seen.size != prepared.n_units
                or not np.array_equal(np.sort(seen), np.arange(prepared.n_units))):
            missing = np.setdiff1d(np.arange(prepared.n_units), seen)
            raise StageError(
                f"partial counts do not cover every work unit exactly once: {seen.size} unit "
                f"results for {prepared.n_units} units, {missing.size} missing (first: "
                f"{missing[:5].tolist()})"
            )
        shape = prepared.binning.shape
        nreg = prepared.n_regions
        c1, c2 = prepared.cat1, prepared.cat2
        return PairCounts(
            mode=prepared.binning.mode,
            edges=tuple(e.copy() for e in prepared.binning.edges),
            weighted=self.weighted.reshape(shape),
            auto=prepared.auto,
            sum_w1=c1.sum_w, sum_w1_sq=c1.sum_w_sq, sum_w2=c2.sum_w, sum_w2_sq=c2.sum_w_sq,
            n1=c1.n, n2=c2.n, los=prepared.los, box_size=prepared.box_size,
            raw=self.raw.reshape(shape) if self.raw is not None else None,
            region_both=self.both.reshape((nreg,) + shape) if self.both is not None else None,
            region_one=self.one.reshape((nreg,) + shape) if self.one is not None else None,
            region_sum_w1=c1.region_sum_w, region_sum_w1_sq=c1.region_sum_w_sq,
            region_sum_w2=c2.region_sum_w, region_sum_w2_sq=c2.region_sum_w_sq,
            mu_range=prepared.binning.mu_range,
            meta={"n_pairs": self.n_pairs, "n_units": prepared.n_units},
        )


def reduce_partials(prepared: PreparedCount, partials) -> PairCounts:
    """Combine partial counts covering every unit exactly once into a :class:`PairCounts`.

    Partials are summed in the order of their first unit, so the same partition of units gives
    bitwise the same result whatever engine, thread count or interruption produced them.
    """
    parts = list(partials)
    reduction = OrderedReduction(prepared, [_first_unit(p) for p in parts])
    for part in sorted(parts, key=_first_unit):
        reduction.add(part)
    return reduction.result()


def count_pairs(positions1, weights1=None, positions2=None, weights2=None, *,
                binning: Binning, los: str = "midpoint", box_size: float | None = None,
                regions1=None, regions2=None, n_regions: int | None = None, raw: bool = False,
                n_threads: int | None = None, progress: bool = False,
                progress_path=None, units_per_batch: int | None = None,
                n_units: int = DEFAULT_UNITS, refine: int | None = None,
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
    loaded = sidecar.load() if sidecar is not None else []
    done = {int(u) for p in loaded for u in p.unit_ids}
    todo = [u.index for u in prepared.units if u.index not in done]
    batches = [todo[i:i + units_per_batch] for i in range(0, len(todo), units_per_batch)]
    # batches are summed as they finish (in unit order), never all held at once
    reduction = OrderedReduction(prepared, [_first_unit(p) for p in loaded] + [b[0] for b in batches])
    for part in sorted(loaded, key=_first_unit):
        reduction.add(part)
    del loaded

    from tqdm.auto import tqdm

    bar = tqdm(total=prepared.n_units, initial=len(done), unit="unit", disable=not show_bars(progress),
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
            reduction.add(part)
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
    return reduction.result()
