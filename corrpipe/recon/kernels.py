"""numba kernels of the reconstruction: read a 3-component mesh field at many points.

Flat module of ``@njit`` functions taking only arrays and numbers. Positions arrive in units of
mesh cells (shifted to the mesh origin and wrapped into [0, n)), as in
:mod:`corrpipe.mesh_kernels`, whose per-axis assignment weights are reused so that painting
and read-out use the same kernels (Hockney & Eastwood 1981, ch. 5).
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from corrpipe.mesh.kernels import axis_weights

__all__ = ["read_vector_kernel"]

_CHUNK = 4096


@njit(cache=True, parallel=True)
def read_vector_kernel(cells, order, fields, out):
    """Interpolate ``fields`` (3, n, n, n) to ``cells`` (N, 3) into ``out`` (N, 3).

    The kernel weights of each point are computed once and applied to the three
    components; points are processed in chunks spread over the threads.
    """
    n = fields.shape[1]
    n_points = cells.shape[0]
    n_chunks = (n_points + _CHUNK - 1) // _CHUNK
    for c in prange(n_chunks):
        ix = np.empty(3, np.int64)
        iy = np.empty(3, np.int64)
        iz = np.empty(3, np.int64)
        wx = np.empty(3, np.float64)
        wy = np.empty(3, np.float64)
        wz = np.empty(3, np.float64)
        stop = min(n_points, (c + 1) * _CHUNK)
        for p in range(c * _CHUNK, stop):
            axis_weights(cells[p, 0], order, ix, wx)
            axis_weights(cells[p, 1], order, iy, wy)
            axis_weights(cells[p, 2], order, iz, wz)
            a0 = 0.0
            a1 = 0.0
            a2 = 0.0
            for a in range(order):
                i = ix[a] % n
                for b in range(order):
                    j = iy[b] % n
                    wab = wx[a] * wy[b]
                    for d in range(order):
                        k = iz[d] % n
                        w = wab * wz[d]
                        a0 += w * fields[0, i, j, k]
                        a1 += w * fields[1, i, j, k]
                        a2 += w * fields[2, i, j, k]
            out[p, 0] = a0
            out[p, 1] = a1
            out[p, 2] = a2
