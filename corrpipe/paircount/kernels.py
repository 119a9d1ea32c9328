"""numba kernels of the pair counter: cell sorting, cost estimates and the counting loop.

Flat module of ``@njit`` functions taking only arrays and numbers (``count_unit_batch`` is a
plain-Python switch between two compiled batch functions). The Python layer in
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
    "cell_regions",
    "region_weight_sums",
    "sort_cells_by_z",
    "N_SPARE",
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


_SHELL_GAPS = np.array([1750, 701, 301, 132, 57, 23, 10, 4, 1], dtype=np.int64)  # Ciura 2001


@njit(cache=True)
def sort_cells_by_z(start, xs, ys, zs, ws, rs, order):
    """Reorder the points of every cell by z (in place), so that a kernel can find the points
    of a cell within a z window by bisection. Shell sort of a permutation per cell (gaps of
    Ciura 2001, extended by 2.25x for large cells): deterministic, no library sort to compile."""
    n_cells = start.shape[0] - 1
    with_regions = rs.shape[0] > 0
    with_order = order.shape[0] > 0
    big = 0
    for c in range(n_cells):
        big = max(big, start[c + 1] - start[c])
    gaps = [np.int64(g) for g in _SHELL_GAPS]
    g = np.int64(_SHELL_GAPS[0])
    while g * 2.25 < big:
        g = np.int64(g * 2.25)
        gaps.insert(0, g)
    perm = np.empty(big, dtype=np.int64)
    key = np.empty(big)
    tmp = np.empty(big)
    tmp_i = np.empty(big, dtype=np.int64)
    for c in range(n_cells):
        a = start[c]
        n = start[c + 1] - a
        if n < 2:
            continue
        ordered = True
        for k in range(1, n):
            if zs[a + k] < zs[a + k - 1]:
                ordered = False
                break
        if ordered:
            continue
        for k in range(n):
            perm[k] = k
            key[k] = zs[a + k]
        for gap in gaps:
            if gap >= n:
                continue
            for k in range(gap, n):
                kv = key[k]
                pv = perm[k]
                m = k
                while m >= gap and key[m - gap] > kv:
                    key[m] = key[m - gap]
                    perm[m] = perm[m - gap]
                    m -= gap
                key[m] = kv
                perm[m] = pv
        for arr in (xs, ys, zs, ws):
            for k in range(n):
                tmp[k] = arr[a + perm[k]]
            for k in range(n):
                arr[a + k] = tmp[k]
        if with_regions:
            for k in range(n):
                tmp_i[k] = rs[a + perm[k]]
            for k in range(n):
                rs[a + k] = tmp_i[k]
        if with_order:
            for k in range(n):
                tmp_i[k] = order[a + perm[k]]
            for k in range(n):
                order[a + k] = tmp_i[k]


@njit(cache=True, inline="always")
def _first_at_least(z, lo, hi, value):
    """First index k in [lo, hi) with z[k] >= value (hi if none); z ascending there."""
    while lo < hi:
        mid = (lo + hi) >> 1
        if z[mid] < value:
            lo = mid + 1
        else:
            hi = mid
    return lo


@njit(cache=True)
def region_weight_sums(regions, weights, n_regions):
    """Sum of weights and of squared weights per region label (float64, n_regions each),
    accumulated in input order."""
    sw = np.zeros(n_regions)
    sw2 = np.zeros(n_regions)
    for i in range(regions.shape[0]):
        w = weights[i]
        sw[regions[i]] += w
        sw2[regions[i]] += w * w
    return sw, sw2


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
def _cell_bounds(c, origin, side, tol, ny, nz):
    """Corners (lo x, y, z, hi x, y, z) of flat cell ``c``, widened by ``tol`` each way."""
    lox = origin[0] + (c // (ny * nz)) * side[0] - tol
    loy = origin[1] + ((c // nz) % ny) * side[1] - tol
    loz = origin[2] + (c % nz) * side[2] - tol
    return lox, loy, loz, lox + side[0] + 2 * tol, loy + side[1] + 2 * tol, loz + side[2] + 2 * tol


@njit(cache=True, inline="always")
def _beyond(x, y, z, lox, loy, loz, hix, hiy, hiz, q_hi):
    """True when the point is at least sqrt(q_hi) from the box, so no pair with it counts."""
    ex = max(lox - x, 0.0, x - hix)
    ey = max(loy - y, 0.0, y - hiy)
    ez = max(loz - z, 0.0, z - hiz)
    return ex * ex + ey * ey + ez * ez >= q_hi


@njit(cache=True, inline="always")
def _wrap(d, box, half):
    """Minimum-image component (branch-free); |d| < box on input."""
    return d + box * ((d < -half) * 1.0 - (d > half) * 1.0)


@njit(cache=True)
def _count_unit(c_lo, c_hi, x1, y1, z1, w1, r1, o1, start1, x2, y2, z2, w2, r2, o2, start2,
                shape, offsets, kinds, periodic, box, mode, los, orient, q_lo, q_hi,
                lut, q0, lut_scale, e2, edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                hist_w, hist_raw, both, one, with_raw, with_regions, jbuf, qbuf,
                origin, side, tol):
    """Count the pairs of catalogue-1 cells ``c_lo <= c1 < c_hi`` into one unit's histograms.

    For each point i and neighbour cell, a first branch-free pass keeps the candidates within
    the separation range; a second pass bins only those. Non-periodic cells that lie entirely
    beyond the search radius of point i are skipped (point-to-cell distance). The per-pair code
    is written out in this one function on purpose: calls that pass arrays cost reference
    counting on every pair.
    """
    nb = edges_b.shape[0] - 1
    eb0 = edges_b[0]
    ebn = edges_b[nb]
    n_lut = lut.shape[0]
    n_e = e2.shape[0] - 1
    e2_lo = e2[0]
    e2_hi = e2[n_e]
    half = 0.5 * box
    nz = shape[2]
    ny = shape[1]
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
            prune = (not periodic) and kind != 1
            lox, loy, loz, hix, hiy, hiz = _cell_bounds(c2, origin, side, tol, ny, nz)
            for i in range(a0, a1):
                xi = x1[i]
                yi = y1[i]
                zi = z1[i]
                if prune and _beyond(xi, yi, zi, lox, loy, loz, hix, hiy, hiz, q_hi):
                    continue
                jlo = i + 1 if kind == 1 else b0
                # pass 1, branch-free: keep the candidates within [q_lo, q_hi)
                m = 0
                if periodic:
                    for j in range(jlo, b1):
                        dx = _wrap(x2[j] - xi, box, half)
                        dy = _wrap(y2[j] - yi, box, half)
                        dz = _wrap(z2[j] - zi, box, half)
                        d2 = dx * dx + dy * dy + dz * dz
                        jbuf[m] = j
                        qbuf[m] = d2
                        m += (d2 < q_hi) & (d2 >= q_lo)
                else:
                    for j in range(jlo, b1):
                        dx = x2[j] - xi
                        dy = y2[j] - yi
                        dz = z2[j] - zi
                        d2 = dx * dx + dy * dy + dz * dz
                        jbuf[m] = j
                        qbuf[m] = d2
                        m += (d2 < q_hi) & (d2 >= q_lo)
                wi = w1[i]
                # pass 2: bin the kept pairs
                for t in range(m):
                    j = jbuf[t]
                    q = qbuf[t]
                    k1 = 0
                    if mode != 0:
                        # projection d.l on the line of sight, d = x_j - x_i
                        dx = x2[j] - xi
                        dy = y2[j] - yi
                        dz = z2[j] - zi
                        flip = orient and o2[j] < o1[i]
                        if los >= 3:
                            if los == 3:
                                dl = dx
                            elif los == 4:
                                dl = dy
                            else:
                                dl = dz
                            if periodic:
                                dl = _wrap(dl, box, half)
                            l2 = 1.0
                        else:
                            if los == 0:
                                lx = xi + x2[j]
                                ly = yi + y2[j]
                                lz = zi + z2[j]
                            elif los == 1:
                                if flip:
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
                        if flip:
                            dl = -dl
                        if mode == 1:
                            tb = dl / np.sqrt(l2 * q) if q > 0.0 else 0.0
                            tb = min(max(tb, -1.0), 1.0)
                            if abs_mu:
                                tb = abs(tb)
                            if tb < eb0 or tb > ebn:
                                continue
                        else:
                            tb = abs(dl) / np.sqrt(l2)
                            if tb >= pi_hi or tb < pi_lo:
                                continue
                            q = max(q - tb * tb, 0.0)
                            if q >= e2_hi or q < e2_lo:
                                continue
                        # second-axis bin: uniform guess or bisection, then exact correction
                        if uniform_b:
                            k1 = int((tb - eb0) * inv_width_b)
                        else:
                            lo_k = 0
                            hi_k = nb
                            while hi_k - lo_k > 1:
                                mid = (lo_k + hi_k) // 2
                                if tb >= edges_b[mid]:
                                    lo_k = mid
                                else:
                                    hi_k = mid
                            k1 = lo_k
                        k1 = min(max(k1, 0), nb - 1)
                        while k1 > 0 and tb < edges_b[k1]:
                            k1 -= 1
                        while k1 < nb - 1 and tb >= edges_b[k1 + 1]:
                            k1 += 1
                    # first-axis bin on squared separation: table guess, exact correction
                    c = int((q - q0) * lut_scale)
                    c = min(max(c, 0), n_lut - 1)
                    k0 = lut[c]
                    while k0 > 0 and q < e2[k0]:
                        k0 -= 1
                    while q >= e2[k0 + 1]:
                        k0 += 1
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


@njit(cache=True)
def _count_unit_smu_uniform(c_lo, c_hi, x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2, start2,
                            shape, offsets, kinds, periodic, box, los, q_lo, q_hi,
                            lut, q0, lut_scale, e2, edges_b, n_mu,
                            hist_w, hist_raw, both, one, with_raw, with_regions, jbuf, qbuf,
                            origin, side, tol):
    """Fast variant of :func:`_count_unit` for the common case: (s, |mu|) with uniform mu bins
    over [0, 1], midpoint or fixed-axis line of sight (no pair orientation needed)."""
    n_lut = lut.shape[0]
    half = 0.5 * box
    nz = shape[2]
    ny = shape[1]
    axis = los - 3
    top = n_mu - 1
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
            prune = (not periodic) and kind != 1
            lox, loy, loz, hix, hiy, hiz = _cell_bounds(c2, origin, side, tol, ny, nz)
            for i in range(a0, a1):
                xi = x1[i]
                yi = y1[i]
                zi = z1[i]
                if prune and _beyond(xi, yi, zi, lox, loy, loz, hix, hiy, hiz, q_hi):
                    continue
                jlo = i + 1 if kind == 1 else b0
                m = 0
                if periodic:
                    for j in range(jlo, b1):
                        dx = _wrap(x2[j] - xi, box, half)
                        dy = _wrap(y2[j] - yi, box, half)
                        dz = _wrap(z2[j] - zi, box, half)
                        d2 = dx * dx + dy * dy + dz * dz
                        jbuf[m] = j
                        qbuf[m] = d2
                        m += (d2 < q_hi) & (d2 >= q_lo)
                else:
                    for j in range(jlo, b1):
                        dx = x2[j] - xi
                        dy = y2[j] - yi
                        dz = z2[j] - zi
                        d2 = dx * dx + dy * dy + dz * dz
                        jbuf[m] = j
                        qbuf[m] = d2
                        m += (d2 < q_hi) & (d2 >= q_lo)
                n_pairs += m
                wi = w1[i]
                for t in range(m):
                    j = jbuf[t]
                    q = qbuf[t]
                    xj = x2[j]
                    yj = y2[j]
                    zj = z2[j]
                    if axis >= 0:
                        if axis == 0:
                            dl = xj - xi
                        elif axis == 1:
                            dl = yj - yi
                        else:
                            dl = zj - zi
                        if periodic:
                            dl = _wrap(dl, box, half)
                        mu = abs(dl) / np.sqrt(q) if q > 0.0 else 0.0
                    else:
                        lx = xi + xj
                        ly = yi + yj
                        lz = zi + zj
                        dl = (xj - xi) * lx + (yj - yi) * ly + (zj - zi) * lz
                        l2 = lx * lx + ly * ly + lz * lz
                        mu = abs(dl) / np.sqrt(l2 * q) if q > 0.0 else 0.0
                    k1 = min(int(mu * n_mu), top)
                    # exact correction against the edges (uniform guess may be one off)
                    if k1 > 0 and mu < edges_b[k1]:
                        k1 -= 1
                    elif k1 < top and mu >= edges_b[k1 + 1]:
                        k1 += 1
                    c = min(int((q - q0) * lut_scale), n_lut - 1)
                    k0 = lut[c]
                    while k0 > 0 and q < e2[k0]:
                        k0 -= 1
                    while q >= e2[k0 + 1]:
                        k0 += 1
                    flat = k0 * n_mu + k1
                    w = wi * w2[j]
                    hist_w[flat] += w
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


@njit(cache=True, inline="always")
def _touch(r, regs, n_reg, touched):
    """Zero region r's rows (both: ``regs[r]``, one: ``regs[n_reg + r]``) the first time a unit
    uses them."""
    if not touched[r]:
        regs[r, :] = 0.0
        regs[n_reg + r, :] = 0.0
        touched[r] = True


@njit(cache=True)
def _touch_cells(c1, c2, r1, start1, r2, start2, cell_region2, regs, n_reg, touched):
    """Clear the region rows the pairs of cells c1 x c2 can add to."""
    for i in range(start1[c1], start1[c1 + 1]):
        _touch(r1[i], regs, n_reg, touched)
    if cell_region2[c2] >= 0:
        _touch(cell_region2[c2], regs, n_reg, touched)
    else:
        for j in range(start2[c2], start2[c2 + 1]):
            _touch(r2[j], regs, n_reg, touched)


@njit(cache=True)
def cell_regions(start, regions):
    """Region label shared by every point of each cell (int32), -1 when a cell mixes regions
    or is empty. ``regions`` is in cell order (as :func:`sort_into_cells` leaves it)."""
    n_cells = start.shape[0] - 1
    out = np.full(n_cells, -1, dtype=np.int32)
    for c in range(n_cells):
        a = start[c]
        b = start[c + 1]
        if a == b:
            continue
        r = regions[a]
        same = True
        for k in range(a + 1, b):
            if regions[k] != r:
                same = False
                break
        if same:
            out[c] = r
    return out


N_SPARE = 16  # spare histogram slots that absorb out-of-range candidates (see below)


@njit(cache=True, inline="always")
def _linear_flat_bin(q, mu, s0, ds, inv_ds, n_s, mu_step, n_mu):
    """Flat (s, |mu|) bin from the squared separation q and |mu| by the exact edge rule, for
    linear bins (the scalar fix-up of the vectorised kernel). Edges are recomputed as
    ``s0 + k * ds`` and ``k * mu_step``, which the caller checked to equal the stored edges bit
    for bit; the guesses are corrected once each way against them, so the documented rule
    (``s_k**2 <= q < s_{k+1}**2``, ``mu_k <= mu < mu_{k+1}``) holds exactly. Valid for q inside
    the separation range (the caller masks the others)."""
    top = n_mu - 1
    k1 = min(int(mu * n_mu), top)
    k1 -= (k1 > 0) & (mu < k1 * mu_step)
    k1 += (k1 < top) & (mu >= (k1 + 1) * mu_step)
    k0 = min(max(int((np.sqrt(q) - s0) * inv_ds), 0), n_s - 1)
    lo = k0 * ds + s0
    k0 -= (k0 > 0) & (q < lo * lo)
    hi = (k0 + 1) * ds + s0
    k0 += (k0 < n_s - 1) & (q >= hi * hi)
    return k0 * n_mu + k1


_NEAR = 1 << 30  # marks a candidate whose bin the fast guess leaves to the exact float64 rule


@njit(cache=True, inline="always")
def _guess_flat_bin(q, mu, s0, inv_ds, n_mu_f, tol_s, tol_mu):
    """Flat (s, |mu|) bin by flooring ``(sqrt(q) - s0) / ds`` and ``mu * n_mu`` (float64,
    branch-free, no integer arithmetic: the cheapest form on AVX2).

    Returns the flat bin as a float, or ``_NEAR`` when either coordinate lies within its
    tolerance (a few hundred float64 rounding errors, in bins) of a bin edge: only there can
    flooring disagree with the documented edge rule, so the caller redoes those few
    candidates with :func:`_exact_flat_bin`. Valid for q inside the separation range."""
    u = mu * n_mu_f
    v = (np.sqrt(q) - s0) * inv_ds
    k1 = np.floor(u)
    k0 = np.floor(v)
    fu = u - k1
    fv = v - k0
    clear = (min(fu, 1.0 - fu) >= tol_mu) & (min(fv, 1.0 - fv) >= tol_s)
    return k0 * n_mu_f + k1 if clear else float(_NEAR)


@njit(cache=True, inline="always")
def _exact_flat_bin(xi, yi, zi, xj, yj, zj, periodic, box, half, axis, s0, ds, inv_ds, n_s,
                    mu_step, n_mu):
    """Flat bin of one pair with mu in float64 (the rule every kernel follows). Repeats the
    separation and mu arithmetic of the vector loops operation for operation, so a candidate
    redone here gets the q and mu the loop computed."""
    if periodic:
        dx = _wrap(xj - xi, box, half)
        dy = _wrap(yj - yi, box, half)
        dz = _wrap(zj - zi, box, half)
    else:
        dx = xj - xi
        dy = yj - yi
        dz = zj - zi
    q = dx * dx + dy * dy + dz * dz
    if axis >= 0:
        dl = dx if axis == 0 else (dy if axis == 1 else dz)
        mu = abs(dl) / np.sqrt(max(q, 1e-300))
    else:
        lx = xi + xj
        ly = yi + yj
        lz = zi + zj
        dl = dx * lx + dy * ly + dz * lz
        l2 = lx * lx + ly * ly + lz * lz
        mu = abs(dl) / np.sqrt(max(l2 * q, 1e-300))
    return _linear_flat_bin(q, mu, s0, ds, inv_ds, n_s, mu_step, n_mu)


@njit(cache=True, error_model="numpy")
def _count_unit_smu_vector(c_lo, c_hi, x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2, start2,
                           shape, offsets, kinds, periodic, box, los, q_lo, q_hi,
                           s0, ds, n_s, n_mu, hist_w, hist_raw, regs, touched,
                           cell_region2, with_raw, with_regions, ibuf, kbuf, origin, side, tol):
    """Vectorised variant of :func:`_count_unit_smu_uniform` for linear s bins.

    For each point i and neighbour cell, one branch-free loop over the contiguous candidates
    computes every candidate's flat bin (SIMD: no compaction, no table look-up, no
    data-dependent branch, unsigned indices so the loads stay contiguous); candidates outside
    the separation range get one of ``N_SPARE`` spare slots past the histogram, rotated so
    that consecutive spare updates do not wait on each other. A second loop adds the weights.
    """
    half = 0.5 * box
    nz = shape[2]
    ny = shape[1]
    axis = los - 3
    inv_ds = 1.0 / ds
    mu_step = 1.0 / n_mu
    n_flat = n_s * n_mu
    n_mu_f = float(n_mu)
    # flooring is exact away from edges; these margins (in bins) far exceed its rounding
    eps = np.finfo(np.float64).eps
    tol_mu = 256.0 * eps * (n_mu + 1.0)
    tol_s = 256.0 * eps * (abs(s0) * inv_ds + n_s + 1.0)
    local = np.zeros(n_flat + N_SPARE)
    local_raw = np.zeros(n_flat + N_SPARE if with_raw else 0, dtype=np.int64)
    n_pairs = 0
    n2 = x2.shape[0]
    n_reg = touched.shape[0]
    scratch = 2 * n_reg
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
            if with_regions:
                _touch_cells(c1, c2, r1, start1, r2, start2, cell_region2, regs, n_reg, touched)
            prune = (not periodic) and kind != 1
            lox, loy, loz, hix, hiy, hiz = _cell_bounds(c2, origin, side, tol, ny, nz)
            for i in range(a0, a1):
                xi = x1[i]
                yi = y1[i]
                zi = z1[i]
                if prune:
                    # points of cell c2 (sorted by z) that can lie within sqrt(q_hi) of i:
                    # the z window left by the distance from i to the cell's x-y rectangle
                    ex = max(lox - xi, 0.0, xi - hix)
                    ey = max(loy - yi, 0.0, yi - hiy)
                    ez = max(loz - zi, 0.0, zi - hiz)
                    exy = ex * ex + ey * ey
                    if exy + ez * ez >= q_hi:
                        continue
                    h = np.sqrt(q_hi - exy) + tol
                    ja = _first_at_least(z2, b0, b1, zi - h)
                    jb = _first_at_least(z2, ja, b1, zi + h)
                    if jb == ja:
                        continue
                    jlo = np.uint64(ja)
                    n_true = jb - ja
                else:
                    jlo = np.uint64(i + 1 if kind == 1 else b0)
                    n_true = b1 - np.int64(jlo)
                # round the trip count up to whole SIMD blocks (no scalar remainder); the
                # extra candidates lie in the following cells and go to spare slots
                n = min((n_true + 7) & ~7, n2 - np.int64(jlo))
                kept = 0
                n_near = 0
                if periodic:
                    for t in range(n):
                        j = jlo + np.uint64(t)
                        dx = _wrap(x2[j] - xi, box, half)
                        dy = _wrap(y2[j] - yi, box, half)
                        dz = _wrap(z2[j] - zi, box, half)
                        q = dx * dx + dy * dy + dz * dz
                        if axis == 0:
                            dl = dx
                        elif axis == 1:
                            dl = dy
                        else:
                            dl = dz
                        ok = (q < q_hi) & (q >= q_lo) & (t < n_true)
                        mu = abs(dl) / np.sqrt(max(q, 1e-300))
                        flat = np.int32(_guess_flat_bin(q, mu, s0, inv_ds, n_mu_f, tol_s, tol_mu))
                        ibuf[t] = flat if ok else np.int32(n_flat + (t & (N_SPARE - 1)))
                        kept += ok
                        n_near += ok & (flat >= _NEAR)
                elif axis >= 0:
                    for t in range(n):
                        j = jlo + np.uint64(t)
                        dx = x2[j] - xi
                        dy = y2[j] - yi
                        dz = z2[j] - zi
                        q = dx * dx + dy * dy + dz * dz
                        if axis == 0:
                            dl = dx
                        elif axis == 1:
                            dl = dy
                        else:
                            dl = dz
                        ok = (q < q_hi) & (q >= q_lo) & (t < n_true)
                        mu = abs(dl) / np.sqrt(max(q, 1e-300))
                        flat = np.int32(_guess_flat_bin(q, mu, s0, inv_ds, n_mu_f, tol_s, tol_mu))
                        ibuf[t] = flat if ok else np.int32(n_flat + (t & (N_SPARE - 1)))
                        kept += ok
                        n_near += ok & (flat >= _NEAR)
                else:
                    for t in range(n):
                        j = jlo + np.uint64(t)
                        xj = x2[j]
                        yj = y2[j]
                        zj = z2[j]
                        dx = xj - xi
                        dy = yj - yi
                        dz = zj - zi
                        q = dx * dx + dy * dy + dz * dz
                        lx = xi + xj
                        ly = yi + yj
                        lz = zi + zj
                        dl = dx * lx + dy * ly + dz * lz
                        l2 = lx * lx + ly * ly + lz * lz
                        ok = (q < q_hi) & (q >= q_lo) & (t < n_true)
                        mu = abs(dl) / np.sqrt(max(l2 * q, 1e-300))
                        flat = np.int32(_guess_flat_bin(q, mu, s0, inv_ds, n_mu_f, tol_s, tol_mu))
                        ibuf[t] = flat if ok else np.int32(n_flat + (t & (N_SPARE - 1)))
                        kept += ok
                        n_near += ok & (flat >= _NEAR)
                if kept == 0:
                    continue
                if n_near:
                    # the rare candidates next to a bin edge: bin them by the exact rule
                    for t in range(n):
                        if ibuf[t] >= _NEAR:
                            j = jlo + np.uint64(t)
                            ibuf[t] = _exact_flat_bin(xi, yi, zi, x2[j], y2[j], z2[j], periodic,
                                                      box, half, axis, s0, ds, inv_ds, n_s,
                                                      mu_step, n_mu)
                n_pairs += kept
                wi = w1[i]
                # compact the kept candidates (branch-free store, then count), so that the
                # scatter loops below touch only pairs that count
                m = 0
                for t in range(n):
                    kbuf[m] = t
                    m += ibuf[t] < n_flat
                if not with_regions:
                    for k in range(m):
                        t = kbuf[k]
                        local[ibuf[t]] += wi * w2[jlo + np.uint64(t)]
                else:
                    # region rows were cleared before the loop over i
                    ri = r1[i]
                    rc = cell_region2[c2]
                    if rc == ri:
                        row = regs[ri]
                        for k in range(m):
                            t = kbuf[k]
                            flat = ibuf[t]
                            w = wi * w2[jlo + np.uint64(t)]
                            local[flat] += w
                            row[flat] += w
                    elif rc >= 0:
                        row_i = regs[n_reg + ri]
                        row_c = regs[n_reg + rc]
                        for k in range(m):
                            t = kbuf[k]
                            flat = ibuf[t]
                            w = wi * w2[jlo + np.uint64(t)]
                            local[flat] += w
                            row_i[flat] += w
                            row_c[flat] += w
                    else:
                        # mixed cell: a same-region pair adds to both[ri] and to the scratch
                        # row; any other pair to one[ri] and one[rj]
                        for k in range(m):
                            t = kbuf[k]
                            j = jlo + np.uint64(t)
                            rj = r2[j]
                            w = wi * w2[j]
                            flat = ibuf[t]
                            same = rj == ri
                            local[flat] += w
                            regs[ri if same else n_reg + ri, flat] += w
                            regs[scratch if same else n_reg + rj, flat] += w
                if with_raw:
                    for t in range(n):
                        local_raw[ibuf[t]] += 1
    for k in range(n_flat):
        hist_w[k] += local[k]
    if with_raw:
        for k in range(n_flat):
            hist_raw[k] += local_raw[k]
    return n_pairs


def count_unit_batch(unit_lo, unit_hi, x1, y1, z1, w1, r1, o1, start1,
                     x2, y2, z2, w2, r2, o2, start2, shape, offsets, kinds, periodic, box,
                     mode, los, orient, q_lo, q_hi, lut, q0, lut_scale, e2,
                     edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                     hist_w, hist_raw, regs, touched, cell_region2, with_raw, with_regions,
                     max_occupancy, origin, side, tol, linear_s, s0, ds):
    """Count a batch of work units in parallel, one histogram slice per unit.

    ``unit_lo[u] <= c1 < unit_hi[u]`` are the catalogue-1 cells of unit u. Histograms have a
    leading unit axis: ``hist_w[u, flat_bin]``. Each unit is counted by one thread in a fixed
    order, so results do not depend on the thread count. The region histograms of unit u are
    ``regs[u]``, shape (2 n_regions + 1, n_flat + N_SPARE): rows ``[0, n_regions)`` hold pairs
    with both members in the region, rows ``[n_regions, 2 n_regions)`` pairs with one member
    there, the last row and the last N_SPARE columns are scratch. ``regs`` may arrive
    uninitialised: a unit zeroes region r's rows before it first adds to them and sets
    ``touched[u, r]``; untouched rows hold no pairs and must be ignored.
    ``cell_region2`` is :func:`cell_regions` of catalogue 2 (empty without regions).
    ``linear_s`` says that the s edges (all but the last) are exactly ``s0 + k * ds`` and the
    mu edges (all but the last) exactly ``k / n_mu``; the fast (s, |mu|) case then runs the
    vectorised kernel. The vectorised and the general kernels are separate compiled
    functions, so a first run compiles only the one it uses.
    Returns the number of accepted pairs per unit (int64).
    """
    nb = edges_b.shape[0] - 1
    fast = bool(mode == 1 and uniform_b and abs_mu and not orient and (los == 0 or los >= 3)
                and edges_b[0] == 0.0 and edges_b[nb] == 1.0)
    if fast and linear_s:
        return _batch_vector(unit_lo, unit_hi, x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2,
                             start2, shape, offsets, kinds, periodic, box, los, q_lo, q_hi,
                             s0, ds, e2.shape[0] - 1, nb, hist_w, hist_raw, regs, touched,
                             cell_region2, with_raw, with_regions, max_occupancy, origin, side,
                             tol)
    return _batch_general(unit_lo, unit_hi, x1, y1, z1, w1, r1, o1, start1,
                          x2, y2, z2, w2, r2, o2, start2, shape, offsets, kinds, periodic, box,
                          mode, los, orient, q_lo, q_hi, lut, q0, lut_scale, e2,
                          edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                          hist_w, hist_raw, regs, touched, cell_region2, with_raw, with_regions,
                          max_occupancy, origin, side, tol, fast)


@njit(cache=True, parallel=True)
def _batch_vector(unit_lo, unit_hi, x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2, start2,
                  shape, offsets, kinds, periodic, box, los, q_lo, q_hi, s0, ds, n_s, n_mu,
                  hist_w, hist_raw, regs, touched, cell_region2, with_raw, with_regions,
                  max_occupancy, origin, side, tol):
    """:func:`count_unit_batch` with the vectorised (s, |mu|) kernel."""
    n_units = unit_lo.shape[0]
    accepted = np.zeros(n_units, dtype=np.int64)
    for u in prange(n_units):
        ibuf = np.empty(max_occupancy + 8, dtype=np.int32)
        kbuf = np.empty(max_occupancy + 8, dtype=np.int64)
        accepted[u] = _count_unit_smu_vector(
            unit_lo[u], unit_hi[u], x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2, start2,
            shape, offsets, kinds, periodic, box, los, q_lo, q_hi, s0, ds, n_s,
            n_mu, hist_w[u], hist_raw[u], regs[u], touched[u], cell_region2, with_raw,
            with_regions, ibuf, kbuf, origin, side, tol)
    return accepted


@njit(cache=True, parallel=True)
def _batch_general(unit_lo, unit_hi, x1, y1, z1, w1, r1, o1, start1,
                   x2, y2, z2, w2, r2, o2, start2, shape, offsets, kinds, periodic, box,
                   mode, los, orient, q_lo, q_hi, lut, q0, lut_scale, e2,
                   edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
                   hist_w, hist_raw, regs, touched, cell_region2, with_raw, with_regions,
                   max_occupancy, origin, side, tol, fast):
    """:func:`count_unit_batch` with the table-driven kernels (``fast``: the (s, |mu|) one)."""
    n_units = unit_lo.shape[0]
    accepted = np.zeros(n_units, dtype=np.int64)
    nb = edges_b.shape[0] - 1
    for u in prange(n_units):
        n_reg = touched.shape[1]
        if with_regions:
            # the general kernels add to any region row: clear them all up front
            for r in range(n_reg):
                _touch(r, regs[u], n_reg, touched[u])
        both = regs[u, :n_reg]
        one = regs[u, n_reg:2 * n_reg]
        jbuf = np.empty(max_occupancy, dtype=np.int64)
        qbuf = np.empty(max_occupancy, dtype=np.float64)
        if fast:
            accepted[u] = _count_unit_smu_uniform(
                unit_lo[u], unit_hi[u], x1, y1, z1, w1, r1, start1, x2, y2, z2, w2, r2, start2,
                shape, offsets, kinds, periodic, box, los, q_lo, q_hi, lut, q0, lut_scale, e2,
                edges_b, nb, hist_w[u], hist_raw[u], both, one, with_raw, with_regions,
                jbuf, qbuf, origin, side, tol)
            continue
        accepted[u] = _count_unit(
            unit_lo[u], unit_hi[u], x1, y1, z1, w1, r1, o1, start1, x2, y2, z2, w2, r2, o2,
            start2, shape, offsets, kinds, periodic, box, mode, los, orient, q_lo, q_hi,
            lut, q0, lut_scale, e2, edges_b, uniform_b, abs_mu, inv_width_b, pi_lo, pi_hi,
            hist_w[u], hist_raw[u], both, one, with_raw, with_regions, jbuf, qbuf,
            origin, side, tol)
    return accepted
