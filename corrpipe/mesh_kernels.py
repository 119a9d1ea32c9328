"""numba kernels for mass assignment to, and read-out from, periodic cubic meshes.

Flat module of ``@njit`` functions that take only arrays and numbers. Positions arrive in
units of mesh cells (already divided by the cell size and shifted to the mesh origin); the
mesh node ``i`` sits at cell coordinate ``i``. Every index wraps periodically.

Assignment orders: 1 = nearest grid point (NGP), 2 = cloud in cell (CIC), 3 = triangular
shaped cloud (TSC) (Hockney & Eastwood 1981, ch. 5).
"""

from __future__ import annotations

import numpy as np
from numba import njit

__all__ = ["axis_weights", "paint_kernel", "read_kernel"]


@njit(cache=True, inline="always")
def axis_weights(u, order, idx, wgt):
    """Fill ``idx`` (int64, 3) and ``wgt`` (float64, 3) for one axis coordinate ``u`` (cells).

    Unused slots get weight 0. Returns nothing; the caller wraps indices.
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
def paint_kernel(cells, weights, order, mesh):
    """Add ``weights`` of points at cell coordinates ``cells`` (N, 3) into ``mesh`` (n, n, n)."""
    n = mesh.shape[0]
    ix = np.empty(3, np.int64)
    iy = np.empty(3, np.int64)
    iz = np.empty(3, np.int64)
    wx = np.empty(3, np.float64)
    wy = np.empty(3, np.float64)
    wz = np.empty(3, np.float64)
    for p in range(cells.shape[0]):
        axis_weights(cells[p, 0], order, ix, wx)
        axis_weights(cells[p, 1], order, iy, wy)
        axis_weights(cells[p, 2], order, iz, wz)
        w = weights[p]
        for a in range(order):
            i = ix[a] % n
            for b in range(order):
                j = iy[b] % n
                wab = w * wx[a] * wy[b]
                for c in range(order):
                    k = iz[c] % n
                    mesh[i, j, k] += wab * wz[c]


@njit(cache=True)
def read_kernel(cells, order, mesh, out):
    """Interpolate ``mesh`` (n, n, n) to cell coordinates ``cells`` (N, 3) into ``out`` (N,)."""
    n = mesh.shape[0]
    ix = np.empty(3, np.int64)
    iy = np.empty(3, np.int64)
    iz = np.empty(3, np.int64)
    wx = np.empty(3, np.float64)
    wy = np.empty(3, np.float64)
    wz = np.empty(3, np.float64)
    for p in range(cells.shape[0]):
        axis_weights(cells[p, 0], order, ix, wx)
        axis_weights(cells[p, 1], order, iy, wy)
        axis_weights(cells[p, 2], order, iz, wz)
        acc = 0.0
        for a in range(order):
            i = ix[a] % n
            for b in range(order):
                j = iy[b] % n
                wab = wx[a] * wy[b]
                for c in range(order):
                    k = iz[c] % n
                    acc += wab * wz[c] * mesh[i, j, k]
        out[p] = acc
