"""Periodic cubic meshes, shared by the mocks and the reconstruction.

``grid`` (mass assignment, read-out, FFTs, smoothing, displacements), ``spectra`` (P_ell and
xi_ell measured on a mesh) and ``kernels`` (the numba painting and read-out loops). The public
names of ``grid`` and ``spectra`` are re-exported here, so ``from corrpipe import mesh;
mesh.paint(...)`` keeps working.
"""

from corrpipe.mesh.grid import *  # noqa: F401,F403
from corrpipe.mesh.grid import __all__ as _grid_all
from corrpipe.mesh.spectra import *  # noqa: F401,F403
from corrpipe.mesh.spectra import __all__ as _spectra_all

__all__ = [*_grid_all, *_spectra_all]
