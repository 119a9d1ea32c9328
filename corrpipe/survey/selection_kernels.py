"""numba loop behind :mod:`corrpipe.survey.selection`: redshifts drawn from per-class tables.

Kernel module (flat ``@njit(cache=True)`` functions over arrays and numbers).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["draw_from_rows"]


@njit(cache=True, parallel=True)
def draw_from_rows(classes, u_bin, u_in, cdf, edges):
    """Redshift per object from its class's piecewise-constant distribution.

    ``cdf`` (n_classes, n_bins) holds each class's cumulative probabilities (last column 1);
    the bin is the first whose cdf exceeds ``u_bin`` (binary search in the row) and the
    redshift is uniform inside it (``u_in``).
    """
    n = classes.size
    n_bins = cdf.shape[1]
    out = np.empty(n)
    for i in prange(n):
        k = classes[i]
        lo, hi = 0, n_bins - 1
        while lo < hi:
            mid = (lo + hi) // 2
            if cdf[k, mid] > u_bin[i]:
                hi = mid
            else:
                lo = mid + 1
        out[i] = edges[lo] + (edges[lo + 1] - edges[lo]) * u_in[i]
    return out
