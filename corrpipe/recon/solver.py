"""The reconstruction solver: the survey mesh geometry, the smoothed density contrast and the
Zel'dovich displacement (exact Fourier solution for a box; iterative for a survey's radial
line of sight).
"""

from __future__ import annotations

import logging
import math

import numpy as np
import scipy.fft
from tqdm.auto import tqdm

from corrpipe import mesh
from corrpipe.errors import InputError, StageError
from corrpipe.recon.kernels import read_vector_kernel
from corrpipe.recon.settings import _DEFAULT_N_MESH, MeshGeometry, ReconSettings
from corrpipe.terminal import show_bars

__all__ = [
    "survey_geometry",
    "box_geometry",
    "survey_density_contrast",
    "box_displacement",
    "survey_displacement",
    "equation_residual",
]

log = logging.getLogger(__name__)


# ----------------------------------------------------------------------------- geometry


def _mesh_size(side: float, settings: ReconSettings) -> tuple[int, float]:
    """(n_mesh, side) from the settings: n_mesh given, or from cell_size (side enlarged)."""
    if settings.n_mesh is not None and settings.cell_size is not None:
        raise InputError("give [reconstruct] n_mesh or cell_size, not both")
    if settings.n_mesh is not None:
        return int(settings.n_mesh), side
    if settings.cell_size is not None:
        n = _nodes_for_cell(side, settings.cell_size)
        return n, n * float(settings.cell_size)
    return _DEFAULT_N_MESH, side


def _nodes_for_cell(side: float, cell: float) -> int:
    """Smallest even FFT-friendly node count (>= 16) with cells no larger than ``cell``."""
    n = scipy.fft.next_fast_len(max(16, int(math.ceil(side / cell))), real=True)
    while n % 2:
        n = scipy.fft.next_fast_len(n + 1, real=True)
    return n


def _check_resolution(geometry: MeshGeometry, smoothing: float) -> None:
    h = geometry.cell_size
    if smoothing < h:
        need = int(math.ceil(geometry.box_size / smoothing))
        raise InputError(
            f"smoothing radius {smoothing:g} Mpc/h is below the mesh cell size {h:.3g} Mpc/h "
            f"({geometry.n_mesh} nodes over {geometry.box_size:.4g} Mpc/h); set [reconstruct] "
            f"n_mesh >= {need} or cell_size <= {smoothing:g}, or raise smoothing")


def _as_positions(positions, name: str) -> np.ndarray:
    try:
        pos = np.asarray(positions, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name} must be a numeric array of shape (N, 3) in Mpc/h: {exc}") \
            from exc
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"{name} must have shape (N, 3) in Mpc/h; got shape {pos.shape}")
    bad = ~np.all(np.isfinite(pos), axis=1)
    if np.any(bad):
        raise InputError(f"{name}: {int(bad.sum())} of {pos.shape[0]} rows have NaN or infinite "
                         f"coordinates (first at row {int(np.argmax(bad))}); drop or fix them")
    return pos


def _as_weights(weights, n: int, name: str) -> np.ndarray:
    if weights is None:
        return np.ones(n, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (n,):
        raise InputError(f"{name} must have shape ({n},) to match the positions; got {w.shape}")
    if not np.all(np.isfinite(w)):
        raise InputError(f"{name}: {int(np.count_nonzero(~np.isfinite(w)))} weights are NaN or "
                         "infinite; fix them before reconstruction")
    if n and not w.sum() > 0:
        raise InputError(f"{name} sum to {w.sum():g}; reconstruction needs a positive total "
                         "weight")
    return w


def survey_geometry(data_positions: np.ndarray, random_positions: np.ndarray,
                    settings: ReconSettings) -> MeshGeometry:
    """Cubic mesh enclosing data and randoms with padding.

    Parameters
    ----------
    data_positions, random_positions : ndarray, shape (N, 3)
        Comoving positions in Mpc/h (observer at the origin).
    settings : ReconSettings
        ``n_mesh`` or ``cell_size``, ``padding``, optional ``box_size``, ``smoothing``.

    Returns
    -------
    MeshGeometry
        Centred on the bounding box of all points; side = extent + 2 padding (or the given
        ``box_size``, enlarged to a whole number of cells when ``cell_size`` is given).

    Raises
    ------
    InputError
        If the given side cannot enclose the points, or the cell exceeds the smoothing radius.
    """
    lo = np.minimum(data_positions.min(axis=0), random_positions.min(axis=0))
    hi = np.maximum(data_positions.max(axis=0), random_positions.max(axis=0))
    span = hi - lo
    extent = float(span.max())
    if settings.box_size is not None:
        side = float(settings.box_size)
        if side <= extent:
            axis = "xyz"[int(np.argmax(span))]
            raise InputError(
                f"[reconstruct] box_size = {side:g} Mpc/h is too small for the survey: data and "
                f"randoms extend over {extent:.4g} Mpc/h along {axis}; set box_size >= "
                f"{extent + 2 * settings.padding:.4g} (extent + 2 x padding) or leave it empty")
    else:
        side = extent + 2.0 * float(settings.padding)
    side = max(side, 1e-6)
    n, side = _mesh_size(side, settings)
    centre = 0.5 * (lo + hi)
    geometry = MeshGeometry(origin=tuple(float(c - 0.5 * side) for c in centre),
                            box_size=float(side), n_mesh=int(n), periodic=False)
    _check_resolution(geometry, settings.smoothing)
    return geometry


def box_geometry(box_size: float, settings: ReconSettings) -> MeshGeometry:
    """Mesh of a periodic box: the box itself, with ``n_mesh`` (or ``cell_size``) from settings.

    With ``cell_size`` the node count is the smallest even FFT-friendly number giving cells no
    larger than ``cell_size``.
    """
    if not np.isfinite(box_size) or box_size <= 0:
        raise InputError(f"box_size must be a positive length in Mpc/h, got {box_size!r}")
    if settings.cell_size is not None:
        n = _nodes_for_cell(box_size, settings.cell_size)
    else:
        n = int(settings.n_mesh) if settings.n_mesh is not None else _DEFAULT_N_MESH
    geometry = MeshGeometry(origin=(0.0, 0.0, 0.0), box_size=float(box_size), n_mesh=n,
                            periodic=True)
    _check_resolution(geometry, settings.smoothing)
    return geometry


# ----------------------------------------------------------------------------- fields


def _smoothing_kernel(n: int, box_size: float, radius: float, dtype) -> np.ndarray:
    return np.exp(-0.5 * mesh.k_squared(n, box_size, dtype) * dtype(radius) ** 2)


def survey_density_contrast(data_positions: np.ndarray, data_weights: np.ndarray,
                            random_positions: np.ndarray, random_weights: np.ndarray,
                            geometry: MeshGeometry, *, smoothing: float, scheme: str = "cic",
                            density_threshold: float = 0.01, dtype: type = np.float64,
                            workers: int | None = None) -> np.ndarray:
    """Smoothed galaxy overdensity of a survey on the mesh.

    Parameters
    ----------
    data_positions, random_positions : ndarray, shape (N, 3)
        Positions in Mpc/h.
    data_weights, random_weights : ndarray, shape (N,)
        Weights.
    geometry : MeshGeometry
    smoothing : float
        Gaussian radius R in Mpc/h; both fields are convolved with exp(-k^2 R^2 / 2).
    scheme : {"ngp", "cic", "tsc"}
    density_threshold : float
        Cells where the smoothed random density is below ``density_threshold`` times its
        typical value get delta = 0. The typical value is the random-weighted mean
        sum(rho_r^2) / sum(rho_r) of the smoothed random mesh, which equals the density inside
        a uniformly filled survey.

    Returns
    -------
    ndarray, shape (n, n, n)
        delta = (rho_d - alpha rho_r) / (alpha rho_r), alpha = sum w_d / sum w_r.

    Notes
    -----
    Padmanabhan et al. 2012, MNRAS 427, 2132, sec. 3 [from memory]: smooth, then divide by
    the randoms' density; the threshold keeps empty cells outside the footprint at delta = 0.
    """
    n, side, origin = geometry.n_mesh, geometry.box_size, np.asarray(geometry.origin)
    kernel = _smoothing_kernel(n, side, smoothing, dtype)
    rho_r = mesh.paint(random_positions, side, n, random_weights, scheme, origin, dtype)
    rho_r = mesh.to_real(mesh.to_fourier(rho_r, workers) * kernel, n, workers)
    rho_d = mesh.paint(data_positions, side, n, data_weights, scheme, origin, dtype)
    rho_d = mesh.to_real(mesh.to_fourier(rho_d, workers) * kernel, n, workers)
    del kernel
    alpha = data_weights.sum() / random_weights.sum()
    positive = np.clip(rho_r, 0, None)
    typical = float(np.sum(positive.astype(np.float64) ** 2) / np.sum(positive, dtype=np.float64))
    del positive
    inside = rho_r > density_threshold * typical
    rho_r *= dtype(alpha)
    delta = np.zeros_like(rho_d)
    np.divide(rho_d, rho_r, out=delta, where=inside)
    delta -= 1
    delta[~inside] = 0
    return delta


def box_displacement(delta_k: np.ndarray, box_size: float, *, bias: float, beta: float,
                     los_axis: int | None) -> np.ndarray:
    """Exact displacement of a periodic box with a fixed line of sight, as its source.

    Parameters
    ----------
    delta_k : ndarray of complex, shape (n, n, n // 2 + 1)
        Transform of the (smoothed) galaxy overdensity.
    box_size : float
        Box side, Mpc/h.
    bias, beta : float
        Linear bias b and beta = f / b.
    los_axis : int or None
        Line-of-sight axis (None or beta = 0: no RSD term).

    Returns
    -------
    theta_k : ndarray of complex, shape (n, n, n // 2 + 1)
        Transform of theta = -div psi; ``mesh.displacement_fourier(theta_k, box_size)`` gives
        psi in Mpc/h.

    Notes
    -----
    With psi = grad phi, div psi + beta d_z psi_z = -delta / b becomes
    k^2 phi_k = delta_k / [b (1 + beta mu^2)], mu = k_z / k (Padmanabhan et al. 2012, MNRAS
    427, 2132, sec. 3 [from memory]); psi_k = i k phi_k.
    """
    n = delta_k.shape[0]
    rdt = delta_k.real.dtype.type
    theta_k = delta_k / rdt(bias)
    if los_axis is not None and beta != 0:
        ks = mesh.wavenumbers(n, box_size, rdt)
        k2 = mesh.k_squared(n, box_size, rdt)
        k2[0, 0, 0] = 1
        theta_k /= 1 + rdt(beta) * ks[los_axis] ** 2 / k2
        del k2
    return theta_k


class _Spectral:
    """Wavenumbers of one mesh for psi_a = IFFT(i k_a theta_k / k^2), one axis at a time."""

    def __init__(self, n: int, box_size: float, dtype, workers):
        self.n = n
        self.workers = workers
        self.ks = list(mesh.derivative_wavenumbers(n, box_size, dtype))
        k2 = mesh.k_squared(n, box_size, dtype)
        k2[0, 0, 0] = 1
        self.inv_k2 = 1 / k2
        self.inv_k2[0, 0, 0] = 0

    def component(self, theta_k: np.ndarray, axis: int) -> np.ndarray:
        """psi along ``axis`` on the mesh, Mpc/h."""
        tmp = theta_k * self.inv_k2
        tmp *= 1j * self.ks[axis]
        return mesh.to_real(tmp, self.n, self.workers)

    def divergence_of_radial(self, theta_k: np.ndarray, coords: tuple,
                             inv_r: np.ndarray) -> np.ndarray:
        """Transform of div[(psi . r_hat) r_hat] for the psi of ``theta_k``."""
        u = None
        for a in range(3):
            part = self.component(theta_k, a)
            part *= coords[a]
            if u is None:
                u = part
            else:
                u += part
            del part
        u *= inv_r
        u *= inv_r            # u = (psi . r) / r^2, so u x_a = (psi . r_hat) r_hat_a
        out = None
        for a in range(3):
            term = mesh.to_fourier(u * coords[a], self.workers)
            term *= 1j * self.ks[a]
            if out is None:
                out = term
            else:
                out += term
            del term
        return out


def _norm(field_k: np.ndarray) -> float:
    return float(np.sqrt(np.sum(field_k.real.astype(np.float64) ** 2
                                + field_k.imag.astype(np.float64) ** 2)))


def _inverse_radius(coords: tuple) -> np.ndarray:
    r2 = coords[0] ** 2 + coords[1] ** 2 + coords[2] ** 2
    inv = np.zeros_like(r2)
    np.divide(1, np.sqrt(r2), out=inv, where=r2 > 0)
    return inv


def equation_residual(psi: np.ndarray, delta: np.ndarray, geometry: MeshGeometry, *,
                      bias: float, beta: float, workers: int | None = None) -> float:
    """Relative residual ||div psi + beta div[(psi.r_hat) r_hat] + delta/b|| / ||delta/b||.

    Parameters
    ----------
    psi : ndarray, shape (3, n, n, n)
        Displacement on the mesh, Mpc/h.
    delta : ndarray, shape (n, n, n)
        The overdensity the displacement was solved from.
    geometry : MeshGeometry
        Mesh placement; the line of sight of node x is x / |x| (observer at the origin).

    Notes
    -----
    Second-order central finite differences (``numpy.gradient``), independent of the
    spectral derivatives of the solver; norms are over all interior nodes (one node
    trimmed on each face).
    """
    h = geometry.cell_size
    coords = geometry.node_coordinates(np.float64)
    inv_r = _inverse_radius(coords)
    p = psi.astype(np.float64)
    u = (p[0] * coords[0] + p[1] * coords[1] + p[2] * coords[2]) * inv_r * inv_r
    total = np.zeros(p.shape[1:])
    for a in range(3):
        total += np.gradient(p[a] + beta * u * coords[a], h, axis=a)
    rhs = delta.astype(np.float64) / bias
    inner = (slice(1, -1),) * 3
    num = np.linalg.norm((total + rhs)[inner])
    return float(num / max(np.linalg.norm(rhs[inner]), 1e-300))


def survey_displacement(delta_k: np.ndarray, geometry: MeshGeometry, *, bias: float,
                        beta: float, max_iterations: int = 10, tolerance: float = 1e-3,
                        workers: int | None = None, progress: bool = False):
    """Iterative displacement of a survey with a radial line of sight (observer at origin).

    Parameters
    ----------
    delta_k : ndarray of complex, shape (n, n, n // 2 + 1)
        Transform of the smoothed overdensity on the survey mesh.
    geometry : MeshGeometry
        Mesh placement (the line of sight of node x is x / |x|).
    bias, beta : float
        Linear bias b and beta = f / b.
    max_iterations : int
        Most iterations.
    tolerance : float
        Stop when the relative equation residual falls below this.
    workers : int, optional
        FFT threads.
    progress : bool
        Show a progress bar over the iterations.

    Returns
    -------
    theta_k : ndarray of complex, shape (n, n, n // 2 + 1)
        Transform of theta = -div psi; ``mesh.displacement_fourier(theta_k, box_size)`` gives
        psi in Mpc/h.
    iterations : int
        Number of updates made.
    history : list of float
        Relative residual of the equation before each update and at the returned solution
        (``len(history) == iterations + 1``).

    Raises
    ------
    StageError
        If the iteration diverges.

    Notes
    -----
    Writing psi = grad phi and theta = -div psi (theta_k = k^2 phi_k), the equation of
    Padmanabhan et al. (2012) reads theta = delta/b + beta D[theta], with D[theta] the
    transform of div[(psi . r_hat) r_hat]. Burden, Percival & Howlett (2015) [from memory]
    iterate theta <- delta/b + beta D[theta]; in the plane-parallel limit D = -mu^2 theta, so
    that fixed point contracts by beta per iteration. We use the relaxed update
    theta <- (1 - w) theta + w (delta/b + beta D[theta]) with w = 2 / (2 + beta), the optimal
    Richardson parameter for an operator with spectrum 1 + beta mu^2, mu^2 in [0, 1] (common
    practice of numerical linear algebra, e.g. Saad 2003, "Iterative Methods for Sparse
    Linear Systems", ch. 4 [from memory]); it contracts by beta / (2 + beta). The start is the
    exact plane-parallel solution for the line of sight through the mesh centre. The residual
    ||theta - delta/b - beta D[theta]|| / ||delta/b|| (sums of squared Fourier amplitudes) is
    the relative residual of the displacement equation at the current iterate.
    """
    n, side = geometry.n_mesh, geometry.box_size
    rdt = delta_k.real.dtype.type
    spectral = _Spectral(n, side, rdt, workers)
    coords = geometry.node_coordinates(rdt)
    inv_r = _inverse_radius(coords)
    target = delta_k / rdt(bias)
    target_norm = max(_norm(target), 1e-300)
    centre = np.asarray(geometry.origin) + 0.5 * side
    dist = float(np.linalg.norm(centre))
    if beta == 0:
        return target, 0, [0.0]
    if dist > 0:
        c = centre / dist
        kx, ky, kz = mesh.wavenumbers(n, side, rdt)
        k_par2 = (kx * rdt(c[0]) + ky * rdt(c[1]) + kz * rdt(c[2])) ** 2
        k_par2 *= spectral.inv_k2
        k_par2 *= rdt(beta)
        k_par2 += 1
        theta = target / k_par2
        del k_par2
    else:
        theta = target / rdt(1 + beta / 3)
    weight = rdt(2.0 / (2.0 + beta))
    history = []
    iterations = 0
    with tqdm(total=max_iterations, desc="reconstruct: solve", disable=not show_bars(progress),
              leave=False) as bar:
        while True:
            update = spectral.divergence_of_radial(theta, coords, inv_r)
            update *= rdt(beta)
            update += target                      # delta/b + beta D[theta]
            history.append(_norm(theta - update) / target_norm)
            if history[-1] < tolerance or iterations >= max_iterations:
                break
            if len(history) >= 3 and history[-1] > history[-2] > history[-3] \
                    and history[-1] > 1:
                raise StageError(
                    f"the survey reconstruction solver diverges (relative residuals "
                    f"{', '.join(f'{h:.3g}' for h in history)}); beta = {beta:g} may be too "
                    "large or the observer inside the mesh; check [reconstruct] bias, "
                    "growth_rate and the survey positions (observer at the origin)")
            theta *= 1 - weight
            update *= weight
            theta += update
            del update
            iterations += 1
            bar.update(1)
    return theta, iterations, history


def _displacement_at(theta_k: np.ndarray, geometry: MeshGeometry, positions: list,
                     scheme: str, workers) -> list:
    """psi (N, 3) read at each array of ``positions`` (Mpc/h) with the assignment kernel."""
    psi = mesh.displacement_fourier(theta_k, geometry.box_size, workers)
    order = mesh.SCHEMES[scheme]
    scale = geometry.n_mesh / geometry.box_size
    origin = np.asarray(geometry.origin, dtype=np.float64)
    out = []
    for p in positions:
        cells = np.ascontiguousarray(np.mod((p - origin) * scale, geometry.n_mesh))
        values = np.empty((p.shape[0], 3), dtype=np.float64)
        read_vector_kernel(cells, order, psi, values)
        out.append(values)
    return out
