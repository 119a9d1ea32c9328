"""numba kernels for mass assignment to, and read-out from, periodic cubic meshes.

Flat module of ``@njit`` functions that take only arrays and numbers. Positions arrive in
units of mesh cells, already wrapped into [0, n) (divided by the cell size and shifted to the
mesh origin); mesh node ``i`` sits at cell coordinate ``i``. Every index wraps periodically.
One kernel per scheme, chosen once by the caller (no branches in the loops):
nearest grid point (NGP), cloud in cell (CIC) and triangular shaped cloud (TSC)
(Hockney & Eastwood 1981, ch. 5).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["axis_weights", "paint_ngp", "paint_cic", "paint_tsc", "read_ngp", "read_cic",
           "read_tsc"]


@njit(cache=True, inline="always")
def axis_weights(u, order, idx, wgt):
    """Fill ``idx`` (int64, 3) and ``wgt`` (float64, 3) for one coordinate ``u`` (cells).

    ``order`` is 1 (NGP), 2 (CIC) or 3 (TSC); unused slots get weight 0. Indices are not
    wrapped. For kernels that take the scheme as an argument (e.g. reconstruction's).
    """
    if order == 1:
        i = np.floor(u + 0.5)
        idx[0] = np.int64(i)
        wgt[0] = 1.0
        idx[1] = idx[0]
        wgt[1] = 0.0
        idx[2] = idx[0]
        wgt[2] = 0.0
    elif order == 2:
        i = np.floor(u)
        d = u - i
        idx[0] = np.int64(i)
        wgt[0] = 1.0 - d
        idx[1] = idx[0] + 1
        wgt[1] = d
        idx[2] = idx[0]
        wgt[2] = 0.0
    else:
        i = np.floor(u + 0.5)
        d = u - i
        idx[0] = np.int64(i) - 1
        wgt[0] = 0.5 * (0.5 - d) ** 2
        idx[1] = np.int64(i)
        wgt[1] = 0.75 - d * d
        idx[2] = np.int64(i) + 1
        wgt[2] = 0.5 * (0.5 + d) ** 2


@njit(cache=True)
def paint_ngp(cells, weights, mesh):
    """Add ``weights`` (N,) at cell coordinates ``cells`` (N, 3) into ``mesh`` by NGP."""
    n = mesh.shape[0]
    for p in range(cells.shape[0]):
        i = np.int64(np.floor(cells[p, 0] + 0.5)) % n
        j = np.int64(np.floor(cells[p, 1] + 0.5)) % n
        k = np.int64(np.floor(cells[p, 2] + 0.5)) % n
        mesh[i, j, k] += weights[p]


@njit(cache=True)
def read_ngp(cells, mesh, out):
    """NGP values of ``mesh`` at ``cells`` (N, 3) into ``out`` (N,)."""
    n = mesh.shape[0]
    for p in range(cells.shape[0]):
        i = np.int64(np.floor(cells[p, 0] + 0.5)) % n
        j = np.int64(np.floor(cells[p, 1] + 0.5)) % n
        k = np.int64(np.floor(cells[p, 2] + 0.5)) % n
        out[p] = mesh[i, j, k]


@njit(cache=True)
def paint_cic(cells, weights, mesh):
    """Add ``weights`` (N,) at cell coordinates ``cells`` (N, 3) into ``mesh`` by CIC."""
    n = mesh.shape[0]
    for p in range(cells.shape[0]):
        fx = np.floor(cells[p, 0])
        fy = np.floor(cells[p, 1])
        fz = np.floor(cells[p, 2])
        dx = cells[p, 0] - fx
        dy = cells[p, 1] - fy
        dz = cells[p, 2] - fz
        i0 = np.int64(fx) % n
        j0 = np.int64(fy) % n
        k0 = np.int64(fz) % n
        i1 = (i0 + 1) % n
        j1 = (j0 + 1) % n
        k1 = (k0 + 1) % n
        w = weights[p]
        wx0 = w * (1.0 - dx)
        wx1 = w * dx
        a00 = wx0 * (1.0 - dy)
        a01 = wx0 * dy
        a10 = wx1 * (1.0 - dy)
        a11 = wx1 * dy
        mesh[i0, j0, k0] += a00 * (1.0 - dz)
        mesh[i0, j0, k1] += a00 * dz
        mesh[i0, j1, k0] += a01 * (1.0 - dz)
        mesh[i0, j1, k1] += a01 * dz
        mesh[i1, j0, k0] += a10 * (1.0 - dz)
        mesh[i1, j0, k1] += a10 * dz
        mesh[i1, j1, k0] += a11 * (1.0 - dz)
        mesh[i1, j1, k1] += a11 * dz


@njit(cache=True)
def read_cic(cells, mesh, out):
    """CIC interpolation of ``mesh`` at ``cells`` (N, 3) into ``out`` (N,)."""
    n = mesh.shape[0]
    for p in range(cells.shape[0]):
        fx = np.floor(cells[p, 0])
        fy = np.floor(cells[p, 1])
        fz = np.floor(cells[p, 2])
        dx = cells[p, 0] - fx
        dy = cells[p, 1] - fy
        dz = cells[p, 2] - fz
        i0 = np.int64(fx) % n
        j0 = np.int64(fy) % n
        k0 = np.int64(fz) % n
        i1 = (i0 + 1) % n
        j1 = (j0 + 1) % n
        k1 = (k0 + 1) % n
        out[p] = ((1.0 - dx) * ((1.0 - dy) * ((1.0 - dz) * mesh[i0, j0, k0]
                                               + dz * mesh[i0, j0, k1])
                                + dy * ((1.0 - dz) * mesh[i0, j1, k0] + dz * mesh[i0, j1, k1]))
                  + dx * ((1.0 - dy) * ((1.0 - dz) * mesh[i1, j0, k0] + dz * mesh[i1, j0, k1])
                          + dy * ((1.0 - dz) * mesh[i1, j1, k0] + dz * mesh[i1, j1, k1])))


@njit(cache=True, inline="always")
def _tsc_axis(u, n):
    """Nearest node (wrapped) and the three TSC weights of one coordinate (cells)."""
    f = np.floor(u + 0.5)
    d = u - f
    i = np.int64(f) % n
    return i, 0.5 * (0.5 - d) ** 2, 0.75 - d * d, 0.5 * (0.5 + d) ** 2


@njit(cache=True)
def paint_tsc(cells, weights, mesh):
    """Add ``weights`` (N,) at cell coordinates ``cells`` (N, 3) into ``mesh`` by TSC."""
    n = mesh.shape[0]
    ix = np.empty(3, np.int64)
    iy = np.empty(3, np.int64)
    iz = np.empty(3, np.int64)
    wx = np.empty(3)
    wy = np.empty(3)
    wz = np.empty(3)
    for p in range(cells.shape[0]):
        i, wx[0], wx[1], wx[2] = _tsc_axis(cells[p, 0], n)
        j, wy[0], wy[1], wy[2] = _tsc_axis(cells[p, 1], n)
        k, wz[0], wz[1], wz[2] = _tsc_axis(cells[p, 2], n)
        ix[0], ix[1], ix[2] = (i - 1) % n, i, (i + 1) % n
        iy[0], iy[1], iy[2] = (j - 1) % n, j, (j + 1) % n
        iz[0], iz[1], iz[2] = (k - 1) % n, k, (k + 1) % n
        w = weights[p]
        for a in range(3):
            for b in range(3):
                wab = w * wx[a] * wy[b]
                for c in range(3):
                    mesh[ix[a], iy[b], iz[c]] += wab * wz[c]


@njit(cache=True)
def read_tsc(cells, mesh, out):
    """TSC interpolation of ``mesh`` at ``cells`` (N, 3) into ``out`` (N,)."""
    n = mesh.shape[0]
    ix = np.empty(3, np.int64)
    iy = np.empty(3, np.int64)
    iz = np.empty(3, np.int64)
    wx = np.empty(3)
    wy = np.empty(3)
    wz = np.empty(3)
    for p in range(cells.shape[0]):
        i, wx[0], wx[1], wx[2] = _tsc_axis(cells[p, 0], n)
        j, wy[0], wy[1], wy[2] = _tsc_axis(cells[p, 1], n)
        k, wz[0], wz[1], wz[2] = _tsc_axis(cells[p, 2], n)
        ix[0], ix[1], ix[2] = (i - 1) % n, i, (i + 1) % n
        iy[0], iy[1], iy[2] = (j - 1) % n, j, (j + 1) % n
        iz[0], iz[1], iz[2] = (k - 1) % n, k, (k + 1) % n
        acc = 0.0
        for a in range(3):
            for b in range(3):
                wab = wx[a] * wy[b]
                for c in range(3):
                    acc += wab * wz[c] * mesh[ix[a], iy[b], iz[c]]
        out[p] = acc
