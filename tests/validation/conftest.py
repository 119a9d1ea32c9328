"""Fixtures shared by the validation tests."""

from __future__ import annotations

import numpy as np
import pytest

from corrpipe import mesh
from corrpipe.cosmology import preset
from corrpipe.mocks.box import linear_density
from corrpipe.theory.linear_power import LinearPower


def zeldovich_lattice(seed: int, n: int, box: float, z: float):
    """One particle per mesh node moved by its Zel'dovich displacement.

    Returns the Lagrangian lattice q (N, 3), the displacement psi(q) (N, 3), the displacement
    mesh (3, n, n, n) and the growth rate f. The field is corrpipe's own Gaussian linear field
    (``linear_density``) with the Eisenstein & Hu (1998) spectrum; psi = IFFT(i k delta_k /
    k^2) (Zel'dovich 1970), so every particle's true linear displacement is known exactly.
    """
    cosmo = preset("planck2018")
    power = LinearPower.eisenstein_hu(cosmo, z=z)
    delta = linear_density(power, box, n, seed)
    psi_mesh = mesh.displacement(delta, box)
    q1 = np.arange(n) * box / n
    q = np.stack(np.meshgrid(q1, q1, q1, indexing="ij"), -1).reshape(-1, 3)
    psi = psi_mesh.reshape(3, -1).T.copy()
    return q, psi, psi_mesh, float(cosmo.growth_rate(z))


@pytest.fixture(scope="session")
def make_zeldovich_lattice():
    """The :func:`zeldovich_lattice` factory, for module-scoped mock fixtures."""
    return zeldovich_lattice
