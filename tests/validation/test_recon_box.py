"""Box reconstruction on Zel'dovich mocks with a known linear field.

The mock: the Gaussian linear field of corrpipe.mocks (``linear_density``) with the
Eisenstein & Hu (1998) power spectrum (corrpipe.theory.linear_power), its Zel'dovich (1970)
displacement psi(q) = IFFT(i k delta_k / k^2) (corrpipe.mesh), and one particle per mesh node
moved to x = q + psi(q) (redshift space: s = x + f psi_z z, Kaiser 1987). The true linear
displacement of every particle is therefore known exactly.
"""

from __future__ import annotations

import numpy as np
import pytest

from corrpipe import mesh, recon

BOX = 1000.0
N_LATTICE = 128
Z = 0.5


def _cross_coefficient(a: np.ndarray, b: np.ndarray, box: float, k_edges: np.ndarray):
    """r(k) = <Re a.b*> / sqrt(<|a|^2><|b|^2>) of two vector fields (3, n, n, n) per k bin."""
    n = a.shape[1]
    kmag = np.sqrt(mesh.k_squared(n, box)).ravel()
    idx = np.digitize(kmag, k_edges) - 1
    nb = len(k_edges) - 1
    good = (idx >= 0) & (idx < nb) & (kmag > 0)
    cross = np.zeros(nb)
    pa = np.zeros(nb)
    pb = np.zeros(nb)
    for c in range(3):
        fa = mesh.to_fourier(a[c]).ravel()[good]
        fb = mesh.to_fourier(b[c]).ravel()[good]
        cross += np.bincount(idx[good], weights=(fa * np.conj(fb)).real, minlength=nb)
        pa += np.bincount(idx[good], weights=np.abs(fa) ** 2, minlength=nb)
        pb += np.bincount(idx[good], weights=np.abs(fb) ** 2, minlength=nb)
    return cross / np.sqrt(pa * pb)


@pytest.fixture(scope="module")
def mock(make_zeldovich_lattice):
    return make_zeldovich_lattice(2026, n=N_LATTICE, box=BOX, z=Z)


@pytest.mark.slow
@pytest.mark.parametrize("space", ["real", "redshift"])
def test_reconstructed_displacement_correlates_with_the_linear_one(mock, space):
    # Requirement of the issue: cross-correlation coefficient > 0.8 on scales larger than the
    # smoothing radius (k < 1/R). Literature: with R = 15 Mpc/h and a dense tracer the
    # reconstructed and true displacements are highly correlated on large scales (Padmanabhan
    # et al. 2012, MNRAS 427, 2132; Burden et al. 2014, MNRAS 445, 3152 [from memory]).
    # Measured here (seed 2026, 128^3 particles, L = 1 Gpc/h, z = 0.5, 128^3 mesh), bins
    # 0-0.02-0.04-0.067 h/Mpc: real space r = 1.000, 0.998, 0.989; redshift space 1.000,
    # 0.997, 0.985 (0.93 at 0.067-0.1, 0.5-0.66 at 0.1-0.15 where the smoothing cuts in).
    q, psi, psi_mesh, f = mock
    x = np.mod(q + psi, BOX)
    los = None
    if space == "redshift":
        x[:, 2] = np.mod(q[:, 2] + (1 + f) * psi[:, 2], BOX)
        los = 2
    settings = recon.ReconSettings(enabled=True, n_mesh=N_LATTICE, smoothing=15.0,
                                   random_ratio=0.05)
    res = recon.reconstruct_box(x, None, BOX, los_axis=los, growth_rate=f, bias=1.0,
                                settings=settings, seed=1)
    # every particle sits on its own Lagrangian node: the reconstructed psi per particle,
    # laid out on the Lagrangian lattice, is directly comparable with psi(q)
    rec_mesh = res.data_displacement.T.reshape(3, N_LATTICE, N_LATTICE, N_LATTICE)
    edges = np.array([0.0, 0.02, 0.04, 1 / 15.0, 0.1, 0.15])
    r = _cross_coefficient(rec_mesh, psi_mesh, BOX, edges)
    print(f"\n{space}-space r(k) in bins {edges.tolist()}: {np.round(r, 3).tolist()}")
    assert np.all(r[:3] > 0.8)
    assert np.all(r[:3] > 0.95)      # what this mock gives; guards against silent degradation
    # the recovered amplitude on large scales: filter exp(-k^2 R^2/2) ~ 1 at k < 0.02
    amp = np.linalg.norm(rec_mesh) / np.linalg.norm(psi_mesh)
    assert 0.5 < amp < 1.1


@pytest.mark.slow
def test_residual_displacement_matches_the_linear_prediction(mock):
    # Linear theory (Zel'dovich 1970; Padmanabhan et al. 2012 [from memory]): reconstruction
    # removes the smoothed displacement S(k) psi, S = exp(-k^2 R^2/2), so the particles are
    # left displaced by [1 - S(k)] psi from q. The rms of that prediction, computed from the
    # known linear psi, must match the measured residual to within the second-order terms
    # (< 20 % here). Measured: 7.41 Mpc/h before, 4.46 after, linear prediction printed.
    q, psi, psi_mesh, f = mock
    x = np.mod(q + psi, BOX)
    radius = 15.0
    settings = recon.ReconSettings(enabled=True, n_mesh=N_LATTICE, smoothing=radius,
                                   random_ratio=0.05)
    res = recon.reconstruct_box(x, None, BOX, los_axis=None, growth_rate=0.0, bias=1.0,
                                settings=settings, seed=1)
    left = (res.data_positions - q + BOX / 2) % BOX - BOX / 2
    rms_before = np.sqrt(np.mean(np.sum(psi**2, axis=1)))
    rms_after = np.sqrt(np.mean(np.sum(left**2, axis=1)))
    keep = 1 - np.exp(-0.5 * mesh.k_squared(N_LATTICE, BOX) * radius**2)
    predicted = np.sqrt(sum(np.mean(mesh.to_real(mesh.to_fourier(psi_mesh[a]) * keep,
                                                 N_LATTICE) ** 2) for a in range(3)))
    print(f"\nrms displacement before {rms_before:.2f}, after {rms_after:.2f}, linear "
          f"prediction {predicted:.2f} Mpc/h")
    assert rms_after < 0.7 * rms_before
    assert rms_after == pytest.approx(predicted, rel=0.2)
