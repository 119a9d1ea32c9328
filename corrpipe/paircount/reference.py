"""Slow, obvious numpy pair counts: the oracle the fast counter is tested against.

All pairs are formed explicitly (O(N1 N2) memory in blocks), so use it on a few thousand
objects at most. It follows the conventions documented in
:func:`corrpipe.paircount.engine.count_pairs` literally.
"""

from __future__ import annotations

import numpy as np

from corrpipe.paircount.binning import Binning

__all__ = ["brute_force_counts"]


def _bin_first(q, edges):
    """Bin of squared separations ``q`` on ``edges`` (s_k^2 <= q < s_{k+1}^2); -1 outside."""
    e2 = edges * edges
    k = np.searchsorted(e2, q, side="right") - 1
    k[(q < e2[0]) | (q >= e2[-1])] = -1
    return k


def _bin_second(t, edges, inclusive_last: bool):
    k = np.searchsorted(edges, t, side="right") - 1
    n = edges.size - 1
    if inclusive_last:
        k[t == edges[-1]] = n - 1
        k[(t < edges[0]) | (t > edges[-1])] = -1
    else:
        k[(t < edges[0]) | (t >= edges[-1])] = -1
    return k


def brute_force_counts(pos1, w1, pos2=None, w2=None, *, binning: Binning, los="midpoint",
                       box_size=None, regions1=None, regions2=None, n_regions=0):
    """Weighted and raw counts by explicit enumeration of all pairs.

    Returns
    -------
    dict
        ``weighted`` and ``raw`` (shape of the binning), and ``both``/``one``
        (n_regions, *shape) when labels are given.
    """
    pos1 = np.asarray(pos1, dtype=np.float64)
    w1 = np.asarray(w1, dtype=np.float64)
    auto = pos2 is None
    if auto:
        pos2, w2, regions2 = pos1, w1, regions1
    if box_size is not None:
        pos1 = np.mod(pos1, box_size)
        pos2 = np.mod(pos2, box_size)
    shape = binning.shape
    nflat = int(np.prod(shape))
    weighted = np.zeros(nflat)
    raw = np.zeros(nflat, dtype=np.int64)
    both = np.zeros((n_regions, nflat))
    one = np.zeros((n_regions, nflat))
    for i in range(pos1.shape[0]):
        j = np.arange(i + 1, pos2.shape[0]) if auto else np.arange(pos2.shape[0])
        if j.size == 0:
            continue
        x1 = pos1[i]
        x2 = pos2[j]
        d = x2 - x1
        if box_size is not None:
            d = d - box_size * np.round(d / box_size)
        # d = x2 - x1; in an auto pair x1 is the member with the smaller input row (i < j)
        d2 = np.einsum("ij,ij->i", d, d)
        if binning.mode == "s":
            k = _bin_first(d2, binning.edges[0])
            flat = k
            keep = k >= 0
        else:
            if los in ("x", "y", "z"):
                dl = d[:, "xyz".index(los)].copy()
            else:
                if los == "midpoint":
                    line = x1 + x2
                elif los == "endpoint":
                    line = np.broadcast_to(x1, x2.shape)
                else:
                    line = x1 / np.linalg.norm(x1) + x2 / np.linalg.norm(x2, axis=1)[:, None]
                dl = np.einsum("ij,ij->i", d, line) / np.linalg.norm(line, axis=1)
            if binning.mode == "smu":
                with np.errstate(invalid="ignore", divide="ignore"):
                    mu = np.where(d2 > 0, dl / np.sqrt(d2), 0.0)
                mu = np.clip(mu, -1.0, 1.0)
                if binning.mu_range == "absolute":
                    mu = np.abs(mu)
                k0 = _bin_first(d2, binning.edges[0])
                k1 = _bin_second(mu, binning.edges[1], inclusive_last=True)
            else:
                pi = np.abs(dl)
                rp2 = np.maximum(d2 - pi * pi, 0.0)
                k0 = _bin_first(rp2, binning.edges[0])
                k1 = _bin_second(pi, binning.edges[1], inclusive_last=False)
            keep = (k0 >= 0) & (k1 >= 0)
            flat = k0 * shape[1] + k1
        ww = w1[i] * w2[j]
        np.add.at(weighted, flat[keep], ww[keep])
        np.add.at(raw, flat[keep], 1)
        if n_regions:
            ri = regions1[i]
            rj = np.asarray(regions2)[j]
            same = keep & (rj == ri)
            diff = keep & (rj != ri)
            np.add.at(both[ri], flat[same], ww[same])
            np.add.at(one[ri], flat[diff], ww[diff])
            np.add.at(one, (rj[diff], flat[diff]), ww[diff])
    out = {"weighted": weighted.reshape(shape), "raw": raw.reshape(shape)}
    if n_regions:
        out["both"] = both.reshape((n_regions,) + shape)
        out["one"] = one.reshape((n_regions,) + shape)
    return out
