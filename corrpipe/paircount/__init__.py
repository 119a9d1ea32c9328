"""Weighted pair counting in (s, mu), (r_p, pi) and s with numba cell lists.

The work is split into three public steps so that any engine can drive it:
:func:`prepare_count` (validate, sort into cells, plan work units), :func:`count_units`
(count some units) and :func:`reduce_partials` (sum them in unit order).
:func:`count_pairs` runs the three with numba threads, a progress bar and a resumable sidecar.
"""

from corrpipe.paircount.binning import Binning
from corrpipe.paircount.engine import (
    LINES_OF_SIGHT,
    CountStopped,
    OrderedReduction,
    PartialCounts,
    PreparedCount,
    WorkUnit,
    count_pairs,
    count_units,
    plan_units,
    prepare_count,
    reduce_partials,
)
from corrpipe.paircount.randoms_rr import (
    analytic_box_rr,
    bin_volumes,
    combine_split_counts,
    split_indices,
    split_random_rr,
)
from corrpipe.paircount.result import PairCounts

__all__ = [
    "Binning",
    "LINES_OF_SIGHT",
    "CountStopped",
    "OrderedReduction",
    "PairCounts",
    "PartialCounts",
    "PreparedCount",
    "WorkUnit",
    "analytic_box_rr",
    "bin_volumes",
    "combine_split_counts",
    "count_pairs",
    "count_units",
    "plan_units",
    "prepare_count",
    "reduce_partials",
    "split_indices",
    "split_random_rr",
]
