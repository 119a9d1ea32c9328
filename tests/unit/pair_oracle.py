"""Brute-force weighted pair counts for small catalogues: an independent oracle for the tests.

Pairs within the largest separation come from scipy.spatial.cKDTree (a general-purpose
library); binning, per-region sums and weight totals are plain numpy. Separations in Mpc/h.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from corrpipe.paircount.result import PairCounts


def _pairs(pos1, pos2, r_max):
    t1 = cKDTree(pos1)
    if pos2 is None:
        ij = t1.query_pairs(r_max, output_type="ndarray")
        return ij[:, 0], ij[:, 1]
    coo = t1.sparse_distance_matrix(cKDTree(pos2), r_max, output_type="coo_matrix")
    return coo.row, coo.col


def brute_counts(pos1, w1, s_edges, pos2=None, w2=None, mu_edges=None, regions1=None,
                 regions2=None, n_regions=0, los="midpoint", mode=None):
    """PairCounts of catalogue 1 with itself (pos2 None) or with catalogue 2.

    mode "s" (mu_edges None), "smu" (|mu| or signed by mu_edges) or "rppi" (mu_edges = pi
    edges, non-negative). los: "midpoint" or an axis "x"/"y"/"z".
    """
    pos1 = np.asarray(pos1, float)
    w1 = np.asarray(w1, float)
    auto = pos2 is None
    p2 = pos1 if auto else np.asarray(pos2, float)
    w2_ = w1 if auto else np.asarray(w2, float)
    s_edges = np.asarray(s_edges, float)
    if mode is None:
        mode = "s" if mu_edges is None else "smu"
    r_max = s_edges[-1] if mode != "rppi" else float(np.hypot(s_edges[-1], mu_edges[-1]))
    i, j = _pairs(pos1, None if auto else p2, r_max * (1 + 1e-12))
    d = pos1[i] - p2[j]
    s = np.sqrt(np.sum(d * d, axis=1))
    if los == "midpoint":
        m = 0.5 * (pos1[i] + p2[j])
        cos = np.sum(d * m, axis=1) / np.maximum(s * np.linalg.norm(m, axis=1), 1e-300)
    else:
        axis = "xyz".index(los)
        cos = d[:, axis] / np.maximum(s, 1e-300)
    ww = w1[i] * w2_[j]
    if mode == "s":
        bins = (s_edges,)
        coords = (s,)
    elif mode == "smu":
        mu_edges = np.asarray(mu_edges, float)
        mu = cos if mu_edges[0] < 0 else np.abs(cos)
        bins = (s_edges, mu_edges)
        coords = (s, mu)
    else:
        pi = np.abs(cos) * s
        rp = np.sqrt(np.maximum(s * s - pi * pi, 0))
        bins = (s_edges, np.asarray(mu_edges, float))
        coords = (rp, pi)
    weighted = np.histogramdd(np.column_stack(coords), bins=bins, weights=ww)[0]
    raw = np.histogramdd(np.column_stack(coords), bins=bins)[0].astype(np.int64)
    extra = {}
    if n_regions:
        r1 = np.asarray(regions1)
        r2 = r1 if auto else np.asarray(regions2)
        both = np.zeros((n_regions,) + weighted.shape)
        one = np.zeros((n_regions,) + weighted.shape)
        a, b = r1[i], r2[j]
        for k in range(n_regions):
            sel_b = (a == k) & (b == k)
            sel_o = (a == k) ^ (b == k)
            if sel_b.any():
                both[k] = np.histogramdd(np.column_stack([c[sel_b] for c in coords]),
                                         bins=bins, weights=ww[sel_b])[0]
            if sel_o.any():
                one[k] = np.histogramdd(np.column_stack([c[sel_o] for c in coords]),
                                        bins=bins, weights=ww[sel_o])[0]
        extra = dict(
            region_both=both, region_one=one,
            region_sum_w1=np.bincount(r1, weights=w1, minlength=n_regions),
            region_sum_w1_sq=np.bincount(r1, weights=w1**2, minlength=n_regions),
            region_sum_w2=np.bincount(r2, weights=w2_, minlength=n_regions),
            region_sum_w2_sq=np.bincount(r2, weights=w2_**2, minlength=n_regions))
    return PairCounts(mode=mode, edges=tuple(bins), weighted=weighted, raw=raw, auto=auto,
                      sum_w1=float(w1.sum()), sum_w1_sq=float((w1**2).sum()),
                      sum_w2=float(w2_.sum()), sum_w2_sq=float((w2_**2).sum()),
                      n1=len(w1), n2=len(w2_), los=los, **extra)
