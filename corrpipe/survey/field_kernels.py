"""numba loops behind :mod:`corrpipe.survey.fields`: the sky grid of candidate fields, the
exact point-in-field test, sampling inside fields and the area a field owns.

The sky is cut into declination bands of height ``band`` (radians); band ``b`` holds
``n_ra[b]`` equal cells in RA. A cell is named by the key ``b * key_stride + j``. Every field
is registered in each cell its bounding cap touches; a direction is then tested exactly only
against the fields registered in its own cell. Fields are registered in table order, so the
first match in a cell's list is the covering field listed first. For points drawn inside a
known field, ownership needs only that field's neighbour lists (earlier fields and holes
whose bounding caps meet it).

Shapes (``shape`` codes): 0 = circle (cap of angular radius ``r``; ``size1`` is its chord
2 sin(r/2)), 1 = rectangle (the region whose gnomonic projection about the centre is the
rectangle ``|x| <= size1``, ``|y| <= size2`` in the rotated tangent axes ``axis1``,
``axis2``, i.e. four great-circle edges).

Kernel module (flat ``@njit(cache=True)`` functions over arrays and numbers).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["count_cells", "covered_by_neighbours", "draw_in_fields", "fill_cells",
           "owned_fractions", "owners_of_angles", "vectors_to_angles_deg"]

EDGE_TOLERANCE = 4e-15
"""Closed field edges: a direction within this many radians (~1e-9 arcsec, a few times the
rounding of a unit vector) outside an edge counts as inside."""


@njit(cache=True)
def _band_of(dec, band, n_bands):
    b = int(np.floor((dec + 0.5 * np.pi) / band))
    b = max(b, 0)
    if b >= n_bands:
        b = n_bands - 1
    return b


@njit(cache=True)
def _cells_of_field(ra, dec, radius, band, n_ra, n_bands, out_b, out_j):
    """Cells touched by the cap (ra, dec, radius); returns how many were written."""
    lo = _band_of(dec - radius - 1e-9, band, n_bands)
    hi = _band_of(dec + radius + 1e-9, band, n_bands)
    full = abs(dec) + radius >= 0.5 * np.pi - 1e-9
    half = 0.0
    if not full:
        s = np.sin(radius) / np.cos(dec)
        if s >= 1.0:
            full = True
        else:
            # RA half-extent of a cap (spherical trigonometry, common practice)
            half = np.arcsin(s) * (1.0 + 1e-9) + 1e-12
    n = 0
    for b in range(lo, hi + 1):
        m = n_ra[b]
        width = 2.0 * np.pi / m
        if full or 2.0 * half >= 2.0 * np.pi - width:
            for j in range(m):
                if out_b is not None:
                    out_b[n] = b
                    out_j[n] = j
                n += 1
            continue
        j0 = int(np.floor((ra - half) / width))
        j1 = int(np.floor((ra + half) / width))
        for jj in range(j0, j1 + 1):
            if out_b is not None:
                out_b[n] = b
                out_j[n] = jj % m
            n += 1
    return n


@njit(cache=True)
def count_cells(ra, dec, radius, band, n_ra):
    """Number of (field, cell) registrations of each field (angles in radians)."""
    n_bands = n_ra.size
    out = np.empty(ra.size, dtype=np.int64)
    for i in range(ra.size):
        out[i] = _cells_of_field(ra[i], dec[i], radius[i], band, n_ra, n_bands, None, None)
    return out


@njit(cache=True)
def fill_cells(ra, dec, radius, band, n_ra, key_stride, starts, keys, fields):
    """Write the cell key and field index of every registration (``starts``: CSR offsets)."""
    n_bands = n_ra.size
    buf_b = np.empty(4 * n_ra.max() + 16, dtype=np.int64)
    buf_j = np.empty_like(buf_b)
    for i in range(ra.size):
        need = starts[i + 1] - starts[i]
        if need > buf_b.size:
            buf_b = np.empty(need, dtype=np.int64)
            buf_j = np.empty(need, dtype=np.int64)
        n = _cells_of_field(ra[i], dec[i], radius[i], band, n_ra, n_bands, buf_b, buf_j)
        for k in range(n):
            keys[starts[i] + k] = buf_b[k] * key_stride + buf_j[k]
            fields[starts[i] + k] = i


@njit(cache=True)
def _inside(px, py, pz, f, shape, centre, axis1, axis2, size1, size2):
    cx, cy, cz = centre[f, 0], centre[f, 1], centre[f, 2]
    if shape[f] == 0:
        # chord length |p - c| against the chord of the radius, 2 sin(r/2) (stable for small r)
        dx, dy, dz = px - cx, py - cy, pz - cz
        chord = np.sqrt(dx * dx + dy * dy + dz * dz)
        return chord <= size1[f] + EDGE_TOLERANCE
    zc = px * cx + py * cy + pz * cz
    if zc <= 0.0:
        return False
    x = px * axis1[f, 0] + py * axis1[f, 1] + pz * axis1[f, 2]
    if abs(x) > size1[f] * zc + EDGE_TOLERANCE:
        return False
    y = px * axis2[f, 0] + py * axis2[f, 1] + pz * axis2[f, 2]
    return abs(y) <= size2[f] * zc + EDGE_TOLERANCE


@njit(cache=True)
def _lookup(px, py, pz, ra, dec, band, n_ra, key_stride, ukeys, ustarts, cell_fields,
            shape, centre, axis1, axis2, size1, size2):
    n_bands = n_ra.size
    b = _band_of(dec, band, n_bands)
    m = n_ra[b]
    j = int(np.floor((ra % (2.0 * np.pi)) / (2.0 * np.pi / m)))
    if j >= m:
        j = m - 1
    key = b * key_stride + j
    k = np.searchsorted(ukeys, key)
    if k >= ukeys.size or ukeys[k] != key:
        return -1
    for q in range(ustarts[k], ustarts[k + 1]):
        f = cell_fields[q]
        if _inside(px, py, pz, f, shape, centre, axis1, axis2, size1, size2):
            return f
    return -1


@njit(cache=True, parallel=True)
def owners_of_angles(ra, dec, band, n_ra, key_stride, ukeys, ustarts, cell_fields,
                     shape, centre, axis1, axis2, size1, size2):
    """First field (table order) containing each direction given in radians, -1 if none."""
    n = ra.size
    out = np.empty(n, dtype=np.int64)
    for i in prange(n):
        cd = np.cos(dec[i])
        out[i] = _lookup(cd * np.cos(ra[i]), cd * np.sin(ra[i]), np.sin(dec[i]), ra[i], dec[i],
                         band, n_ra, key_stride, ukeys, ustarts, cell_fields, shape, centre,
                         axis1, axis2, size1, size2)
    return out


@njit(cache=True, parallel=True)
def draw_in_fields(which, u1, u2, u3, shape, centre, axis1, axis2, size1, size2):
    """One proposal per entry of ``which``: unit vectors (n, 3) and whether to keep each.

    Circles: sin(theta/2) = sqrt(u1) sin(r/2) (1 - cos theta uniform, so uniform in the cap),
    azimuth 2 pi u2, always kept. Rectangles: (x, y) uniform on the gnomonic rectangle, kept
    with probability (1 + x^2 + y^2)^(-3/2), the gnomonic area element (common practice).
    """
    n = which.size
    vec = np.empty((n, 3))
    keep = np.empty(n, dtype=np.bool_)
    for i in prange(n):
        f = which[i]
        if shape[f] == 0:
            theta = 2.0 * np.arcsin(np.sqrt(u1[i]) * 0.5 * size1[f])
            phi = 2.0 * np.pi * u2[i]
            t = np.tan(theta)
            x, y = t * np.cos(phi), t * np.sin(phi)
            keep[i] = True
        else:
            x = (2.0 * u1[i] - 1.0) * size1[f]
            y = (2.0 * u2[i] - 1.0) * size2[f]
            keep[i] = u3[i] * (1.0 + x * x + y * y) ** 1.5 < 1.0
        norm = 1.0 / np.sqrt(1.0 + x * x + y * y)
        for c in range(3):
            vec[i, c] = (centre[f, c] + x * axis1[f, c] + y * axis2[f, c]) * norm
    return vec, keep


@njit(cache=True, parallel=True)
def vectors_to_angles_deg(vec):
    """RA in [0, 360) and Dec (degrees) of unit vectors; atan2 keeps precision at the poles."""
    n = vec.shape[0]
    ra = np.empty(n)
    dec = np.empty(n)
    for i in prange(n):
        px, py, pz = vec[i, 0], vec[i, 1], vec[i, 2]
        a = np.degrees(np.arctan2(py, px))
        ra[i] = a + 360.0 if a < 0.0 else a
        if ra[i] >= 360.0:
            ra[i] -= 360.0
        dec[i] = np.degrees(np.arctan2(pz, np.sqrt(px * px + py * py)))
    return ra, dec


@njit(cache=True)
def _in_neighbour(px, py, pz, f, f_start, f_list, shape, centre, axis1, axis2, size1, size2,
                  v_start, v_list, h_shape, h_centre, h_axis1, h_axis2, h_size1, h_size2):
    """Whether a point of field f lies in a field listed before f or in a hole near f."""
    for q in range(f_start[f], f_start[f + 1]):
        if _inside(px, py, pz, f_list[q], shape, centre, axis1, axis2, size1, size2):
            return True
    for q in range(v_start[f], v_start[f + 1]):
        if _inside(px, py, pz, v_list[q], h_shape, h_centre, h_axis1, h_axis2, h_size1,
                   h_size2):
            return True
    return False


@njit(cache=True, parallel=True)
def covered_by_neighbours(vec, which, f_start, f_list, shape, centre, axis1, axis2, size1,
                          size2, v_start, v_list, h_shape, h_centre, h_axis1, h_axis2,
                          h_size1, h_size2):
    """For points drawn in fields ``which``: True where an earlier field or a hole covers
    them (so the field does not own them). ``f_*``/``v_*`` are CSR lists of each field's
    earlier overlapping fields and nearby holes; ``h_*`` the holes' geometry."""
    n = which.size
    out = np.empty(n, dtype=np.bool_)
    for i in prange(n):
        out[i] = _in_neighbour(vec[i, 0], vec[i, 1], vec[i, 2], which[i], f_start, f_list,
                               shape, centre, axis1, axis2, size1, size2, v_start, v_list,
                               h_shape, h_centre, h_axis1, h_axis2, h_size1, h_size2)
    return out


@njit(cache=True, parallel=True)
def owned_fractions(touched, jitter, f_start, f_list, shape, centre, axis1, axis2, size1,
                    size2, v_start, v_list, h_shape, h_centre, h_axis1, h_axis2, h_size1,
                    h_size2):
    """Area fraction of each touched field that it owns (no earlier field, no hole).

    Each field is sampled on a jittered n x n grid (``jitter``, shape (n * n, 2), the same
    offsets for every field) of its bounding rectangle in the gnomonic plane, each point
    weighted by the gnomonic area element (1 + x^2 + y^2)^(-3/2) (stratified sampling,
    common practice); for circles only points with x^2 + y^2 <= tan^2 r count. Neighbour
    lists as in :func:`covered_by_neighbours`.
    """
    n_side = int(np.sqrt(jitter.shape[0]) + 0.5)
    out = np.empty(touched.size)
    for t in prange(touched.size):
        f = touched[t]
        if shape[f] == 0:
            half = np.tan(2.0 * np.arcsin(0.5 * size1[f]))
            half_x, half_y, limit = half, half, half * half
        else:
            half_x, half_y, limit = size1[f], size2[f], np.inf
        kept, total = 0.0, 0.0
        for a in range(n_side):
            for b in range(n_side):
                s = a * n_side + b
                x = (2.0 * (a + jitter[s, 0]) / n_side - 1.0) * half_x
                y = (2.0 * (b + jitter[s, 1]) / n_side - 1.0) * half_y
                rho2 = x * x + y * y
                if rho2 > limit:
                    continue
                q = 1.0 + rho2
                norm = 1.0 / np.sqrt(q)
                w = norm / q
                px = (centre[f, 0] + x * axis1[f, 0] + y * axis2[f, 0]) * norm
                py = (centre[f, 1] + x * axis1[f, 1] + y * axis2[f, 1]) * norm
                pz = (centre[f, 2] + x * axis1[f, 2] + y * axis2[f, 2]) * norm
                total += w
                if not _in_neighbour(px, py, pz, f, f_start, f_list, shape, centre, axis1,
                                     axis2, size1, size2, v_start, v_list, h_shape, h_centre,
                                     h_axis1, h_axis2, h_size1, h_size2):
                    kept += w
        out[t] = kept / total
    return out
