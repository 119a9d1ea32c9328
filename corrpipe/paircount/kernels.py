"""numba kernels of the pair counter: cell sorting, cost estimates and the counting loop.

Flat module of ``@njit`` functions taking only arrays and numbers. The Python layer in
:mod:`corrpipe.paircount.engine` validates inputs, builds the grid and picks the arguments.

Codes shared with the Python layer:

- mode: 0 isotropic s, 1 (s, mu), 2 (r_p, pi)
- los:  0 midpoint, 1 endpoint, 2 bisector, 3/4/5 fixed axis x/y/z
- offset kind: 0 ordinary cell pair, 1 same cell (auto-count: only j > i),
  2 periodic self-conjugate offset (visit the cell pair only once, when c2 > c1)
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = [
    "cell_of_points",
    "sort_into_cells",
    "cell_pair_costs",
    "count_unit_batch",
]


@njit(cache=True)
def _cell_index(x, y, z, ox, oy, oz, inv_side, nx, ny, nz):
    ix = int((x - ox) * inv_side[0])
    iy = int((y - oy) * inv_side[1])
    iz = int((z - oz) * inv_side[2])
    ix = min(max(ix, 0), nx - 1)
    iy = min(max(iy, 0), ny - 1)
    iz = min(max(iz, 0), nz - 1)
    return (ix * ny + iy) * nz + iz


@njit(cache=True)
def cell_of_points(pos, origin, inv_side, shape, box):
    """Number of points in each cell (int64, n_cells). ``box`` > 0 wraps positions periodically."""
    nx, ny, nz = shape[0], shape[1], shape[2]
    counts = np.zeros(nx * ny * nz, dtype=np.int64)
    for i in range(pos.shape[0]):
        x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
        if box > 0:
            x = x % box
            y = y % box
            z = z % box
        counts[_cell_index(x, y, z, origin[0], origin[1], origin[2], inv_side, nx, ny, nz)] += 1
    return counts


@njit(cache=True)
def sort_into_cells(pos, weights, regions, origin, inv_side, shape, box, start,
                    xs, ys, zs, ws, rs, order):
    """Stable counting sort of points into cells (cell index recomputed, no temporary arrays).

    Fills ``xs, ys, zs, ws`` (float64), ``rs`` (int32, if ``regions`` is non-empty) and
    ``order`` (original index, int64, if non-empty) in cell order; ``start`` holds the first
    sorted index of each cell (length n_cells + 1).
    """
    nx, ny, nz = shape[0], shape[1], shape[2]
    fill = start[:-1].copy()
    with_regions = regions.shape[0] > 0
    with_order = order.shape[0] > 0
    for i in range(pos.shape[0]):
        x, y, z = pos[i, 0], pos[i, 1], pos[i, 2]
        if box > 0:
            x = x % box
            y = y % box
            z = z % box
        c = _cell_index(x, y, z, origin[0], origin[1], origin[2], inv_side, nx, ny, nz)
        k = fill[c]
        fill[c] = k + 1
        xs[k] = x
        ys[k] = y
        zs[k] = z
        ws[k] = weights[i]
        if with_regions:
            rs[k] = regions[i]
        if with_order:
            order[k] = i


@njit(cache=True)
def _neighbour(c1, off, shape, periodic):
    """Linear index of the cell at offset ``off`` from ``c1`` (-1 when outside the grid)."""
    nx, ny, nz = shape[0], shape[1], shape[2]
    iz = c1 % nz
    iy = (c1 // nz) % ny
    ix = c1 // (ny * nz)
    jx = ix + off[0]
    jy = iy + off[1]
    jz = iz + off[2]
    if periodic:
        jx = jx % nx
        jy = jy % ny
        jz = jz % nz
    elif jx < 0 or jx >= nx or jy < 0 or jy >= ny or jz < 0 or jz >= nz:
        return -1
    return (jx * ny + jy) * nz + jz


@njit(cache=True)
def cell_pair_costs(start1, start2, shape, offsets, kinds, periodic):
    """Estimated work (number of candidate point pairs) of each catalogue-1 cell (float64)."""
    n_cells = start1.shape[0] - 1
    cost = np.zeros(n_cells, dtype=np.float64)
    for c1 in range(n_cells):
        n1 = start1[c1 + 1] - start1[c1]
        if n1 == 0:
            continue
        total = 0.0
        for o in range(offsets.shape[0]):
            c2 = _neighbour(c1, offsets[o], shape, periodic)
            if c2 < 0 or (kinds[o] == 2 and c2 <= c1):
                continue
            n2 = start2[c2 + 1] - start2[c2]
            if kinds[o] == 1:
                total += 0.5 * (n2 - 1)
            else:
                total += n2
        cost[c1] = n1 * total + n1
    return cost


@njit(cache=True, inline="always")
def _first_bin(q, q0, lut, lut_scale, e2):
    """Bin of a squared separation ``q`` on squared edges ``e2`` (table guess, exact correction)."""
    c = int((q - q0) * lut_scale)
    c = min(max(c, 0), lut.shape[0] - 1)
    k = lut[c]
    while k > 0 and q < e2[k]:
        k -= 1
    while q >= e2[k + 1]:
        k += 1
    return k


@njit(cache=True, inline="always")
def _second_bin(t, edges, uniform, inv_width):
    """Bin of ``t`` on ``edges`` (last edge inclusive); -1 when outside."""
    n = edges.shape[0] - 1
    if t < edges[0] or t > edges[n]:
        return -1
    if uniform:
        k = int((t - edges[0]) * inv_width)
    else:
        k = np.searchsorted(edges, t, side="right") - 1
    k = min(max(k, 0), n - 1)
    while k > 0 and t < edges[k]:
        k -= 1
    while k < n - 1 and t >= edges[k + 1]:
        k += 1
    return k


@njit(cache=True)
def _count_unit(c_lo, c_hi, x1, y1, z1, w1, r1, o1, start1, x2, y2, z2, w2, r2, o2, start2,
                shape, offsets, kinds, periodic, box, mode, los, orient, q_lo, q_hi,
                lut, q0, lut_scale, e2, edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                hist_w, hist_raw, both, one, with_raw, with_regions, jbuf, qbuf):
    """Count the pairs of catalogue-1 cells ``c_lo <= c1 < c_hi`` into one unit's histograms."""
    nb = edges_b.shape[0] - 1
    half = 0.5 * box
    axis = los - 3
    n_pairs = 0
    for c1 in range(c_lo, c_hi):
        a0 = start1[c1]
        a1 = start1[c1 + 1]
        if a0 == a1:
            continue
        for o in range(offsets.shape[0]):
            c2 = _neighbour(c1, offsets[o], shape, periodic)
            if c2 < 0:
                continue
            kind = kinds[o]
            if kind == 2 and c2 <= c1:
                continue
            b0 = start2[c2]
            b1 = start2[c2 + 1]
            if b0 == b1:
                continue
            for i in range(a0, a1):
                xi = x1[i]
                yi = y1[i]
                zi = z1[i]
                wi = w1[i]
                jlo = i + 1 if kind == 1 else b0
                # pass 1, branch-free: keep the candidates within [q_lo, q_hi)
                m = 0
                for j in range(jlo, b1):
                    dx = x2[j] - xi
                    dy = y2[j] - yi
                    dz = z2[j] - zi
                    if periodic:
                        dx += box * ((dx < -half) * 1.0 - (dx > half) * 1.0)
                        dy += box * ((dy < -half) * 1.0 - (dy > half) * 1.0)
                        dz += box * ((dz < -half) * 1.0 - (dz > half) * 1.0)
                    d2 = dx * dx + dy * dy + dz * dz
                    jbuf[m] = j
                    qbuf[m] = d2
                    m += (d2 < q_hi) & (d2 >= q_lo)
                # pass 2: bin the kept pairs
                for t in range(m):
                    j = jbuf[t]
                    d2 = qbuf[t]
                    k1 = 0
                    if mode == 0:
                        k0 = _first_bin(d2, q0, lut, lut_scale, e2)
                    else:
                        dx = x2[j] - xi
                        dy = y2[j] - yi
                        dz = z2[j] - zi
                        if periodic:
                            dx += box * ((dx < -half) * 1.0 - (dx > half) * 1.0)
                            dy += box * ((dy < -half) * 1.0 - (dy > half) * 1.0)
                            dz += box * ((dz < -half) * 1.0 - (dz > half) * 1.0)
                        # orientation of the pair: d points from the "first" member
                        sgn = 1.0
                        first_is_j = False
                        if orient and o2[j] < o1[i]:
                            sgn = -1.0
                            first_is_j = True
                        if los >= 3:
                            if axis == 0:
                                dl = dx
                            elif axis == 1:
                                dl = dy
                            else:
                                dl = dz
                            l2 = 1.0
                        else:
                            if los == 0:
                                lx = xi + x2[j]
                                ly = yi + y2[j]
                                lz = zi + z2[j]
                            elif los == 1:
                                if first_is_j:
                                    lx = x2[j]
                                    ly = y2[j]
                                    lz = z2[j]
                                else:
                                    lx = xi
                                    ly = yi
                                    lz = zi
                            else:
                                ni = 1.0 / np.sqrt(xi * xi + yi * yi + zi * zi)
                                nj = 1.0 / np.sqrt(x2[j] * x2[j] + y2[j] * y2[j] + z2[j] * z2[j])
                                lx = xi * ni + x2[j] * nj
                                ly = yi * ni + y2[j] * nj
                                lz = zi * ni + z2[j] * nj
                            l2 = lx * lx + ly * ly + lz * lz
                            dl = dx * lx + dy * ly + dz * lz
                        dl *= sgn
                        if mode == 1:
                            if d2 > 0.0:
                                mu = dl / np.sqrt(l2 * d2)
                            else:
                                mu = 0.0
                            if mu > 1.0:
                                mu = 1.0
                            elif mu < -1.0:
                                mu = -1.0
                            if abs_mu:
                                mu = abs(mu)
                            k1 = _second_bin(mu, edges_b, uniform_b, inv_width_b)
                            if k1 < 0:
                                continue
                            k0 = _first_bin(d2, q0, lut, lut_scale, e2)
                        else:
                            pi = abs(dl) / np.sqrt(l2)
                            if pi >= pi_hi or pi < pi_lo:
                                continue
                            rp2 = d2 - pi * pi
                            if rp2 < 0.0:
                                rp2 = 0.0
                            if rp2 >= e2[e2.shape[0] - 1] or rp2 < e2[0]:
                                continue
                            k1 = _second_bin(pi, edges_b, uniform_b, inv_width_b)
                            k0 = _first_bin(rp2, q0, lut, lut_scale, e2)
                    flat = k0 * nb + k1
                    w = wi * w2[j]
                    hist_w[flat] += w
                    n_pairs += 1
                    if with_raw:
                        hist_raw[flat] += 1
                    if with_regions:
                        ri = r1[i]
                        rj = r2[j]
                        if ri == rj:
                            both[ri, flat] += w
                        else:
                            one[ri, flat] += w
                            one[rj, flat] += w
    return n_pairs


@njit(cache=True, parallel=True)
def count_unit_batch(unit_lo, unit_hi, x1, y1, z1, w1, r1, o1, start1,
                     x2, y2, z2, w2, r2, o2, start2, shape, offsets, kinds, periodic, box,
                     mode, los, orient, q_lo, q_hi, lut, q0, lut_scale, e2,
                     edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                     hist_w, hist_raw, both, one, with_raw, with_regions, max_occupancy):
    """Count a batch of work units in parallel, one histogram slice per unit.

    ``unit_lo[u] <= c1 < unit_hi[u]`` are the catalogue-1 cells of unit u. Histograms have a
    leading unit axis: ``hist_w[u, flat_bin]``, ``both[u, region, flat_bin]``. Each unit is
    counted by one thread in a fixed order, so results do not depend on the thread count.
    Returns the number of accepted pairs per unit (int64).
    """
    n_units = unit_lo.shape[0]
    accepted = np.zeros(n_units, dtype=np.int64)
    for u in prange(n_units):
        jbuf = np.empty(max_occupancy, dtype=np.int64)
        qbuf = np.empty(max_occupancy, dtype=np.float64)
        accepted[u] = _count_unit(
            unit_lo[u], unit_hi[u], x1, y1, z1, w1, r1, o1, start1, x2, y2, z2, w2, r2, o2,
            start2, shape, offsets, kinds, periodic, box, mode, los, orient, q_lo, q_hi,
            lut, q0, lut_scale, e2, edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
            hist_w[u], hist_raw[u], both[u], one[u], with_raw, with_regions, jbuf, qbuf)
    return accepted
