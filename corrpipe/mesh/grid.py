"""Periodic cubic meshes: mass assignment, read-out, FFTs, smoothing and displacements.

Conventions used everywhere in this module

* The mesh covers the cube ``[origin, origin + box_size)^3`` (Mpc/h) with ``n_mesh`` nodes per
  side; node ``(i, j, k)`` sits at ``origin + (i, j, k) * box_size / n_mesh``. Every index wraps
  periodically, so a survey embedded in a padded box can use the same functions.
* Fourier transforms are real-to-complex (``scipy.fft.rfftn``) with numpy's sign and scaling
  convention: ``F_k = sum_x f(x) exp(-i k.x)``, and the inverse carries the ``1/n^3``. The last
  axis is the half axis of length ``n_mesh // 2 + 1``.
* Wavenumbers are in h/Mpc, power spectra in (Mpc/h)^3: ``P(k) = V |F_k|^2 / n^6`` for a
  density contrast sampled on the mesh (V = box volume).
* Real fields keep the dtype they are given (float32 or float64); complex fields follow it.
  A 512^3 float32 field takes 0.5 GiB and its transform 0.5 GiB.
"""

from __future__ import annotations

import os

import numpy as np
import scipy.fft

from corrpipe.errors import InputError
from corrpipe.mesh import kernels as mesh_kernels
__all__ = [
    "derivative_wavenumbers",
    "SCHEMES",
    "cell_size",
    "paint",
    "interpolate",
    "interpolate_vector",
    "density_contrast",
    "wavenumbers",
    "k_squared",
    "to_fourier",
    "to_real",
    "assignment_window",
    "compensate",
    "gaussian_smooth",
    "gaussian_smooth_fourier",
    "gradient",
    "displacement",
    "displacement_fourier",
    "displacement_component",
]

#: Mass-assignment schemes and their order (number of cells touched per axis).
SCHEMES = {"ngp": 1, "cic": 2, "tsc": 3}


def _workers(workers: int | None) -> int:
    return int(workers) if workers is not None else max(1, os.cpu_count() or 1)


_PAINT = {1: mesh_kernels.paint_ngp, 2: mesh_kernels.paint_cic, 3: mesh_kernels.paint_tsc}
_READ = {1: mesh_kernels.read_ngp, 2: mesh_kernels.read_cic, 3: mesh_kernels.read_tsc}


def _order(scheme: str) -> int:
    try:
        return SCHEMES[str(scheme).lower()]
    except KeyError:
        raise InputError(
            f"unknown mass-assignment scheme {scheme!r}; choose one of {sorted(SCHEMES)}"
        ) from None


def _check_box(box_size: float, n_mesh: int) -> None:
    if not np.isfinite(box_size) or box_size <= 0:
        raise InputError(f"box_size must be a positive length in Mpc/h, got {box_size!r}")
    if int(n_mesh) != n_mesh or n_mesh < 2:
        raise InputError(f"n_mesh must be an integer >= 2, got {n_mesh!r}")


def _check_field(field: np.ndarray, name: str = "field") -> int:
    if field.ndim != 3 or not (field.shape[0] == field.shape[1] == field.shape[2]):
        raise InputError(f"{name} must be a cubic 3-D mesh (n, n, n); got shape {field.shape}")
    return field.shape[0]


def _cells(positions: np.ndarray, box_size: float, n_mesh: int, origin) -> np.ndarray:
    pos = np.asarray(positions, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"positions must have shape (N, 3) in Mpc/h; got shape {pos.shape}")
    if pos.shape[0] and not np.all(np.isfinite(pos)):
        bad = int(np.count_nonzero(~np.all(np.isfinite(pos), axis=1)))
        raise InputError(f"positions contain {bad} rows with NaN or infinite coordinates; "
                         "drop or fix those rows before painting")
    scale = n_mesh / box_size
    cells = (pos - np.asarray(origin, dtype=np.float64)) * scale
    # wrap once into [0, n) so the floor in the kernel stays in int64 range for huge offsets
    # (np.mod leaves values already in [0, n) unchanged, so skip it when none is outside)
    if cells.size and cells.min() >= 0.0 and cells.max() < n_mesh:
        return cells
    return np.ascontiguousarray(np.mod(cells, n_mesh))


def cell_size(box_size: float, n_mesh: int) -> float:
    """Side of one mesh cell in Mpc/h (``box_size / n_mesh``)."""
    _check_box(box_size, n_mesh)
    return float(box_size) / int(n_mesh)


def paint(
    positions: np.ndarray,
    box_size: float,
    n_mesh: int,
    weights: np.ndarray | None = None,
    scheme: str = "cic",
    origin: float | np.ndarray = 0.0,
    dtype: type = np.float64,
) -> np.ndarray:
    """Assign weighted points to a periodic mesh.

    Parameters
    ----------
    positions : ndarray of float, shape (N, 3)
        Point positions in Mpc/h.
    box_size : float
        Side of the periodic cube in Mpc/h.
    n_mesh : int
        Number of mesh nodes per side.
    weights : ndarray of float, shape (N,), optional
        Weight of each point (default 1).
    scheme : {"ngp", "cic", "tsc"}
        Mass-assignment scheme.
    origin : float or ndarray of shape (3,)
        Position of mesh node (0, 0, 0) in Mpc/h.
    dtype : numpy dtype
        Output dtype (``np.float32`` halves the memory; accumulation is then in float32).

    Returns
    -------
    ndarray, shape (n_mesh, n_mesh, n_mesh)
        Sum of assigned weights per node (not divided by the cell volume). The total equals
        ``weights.sum()``.

    Notes
    -----
    NGP, CIC and TSC kernels of Hockney & Eastwood (1981), "Computer Simulation Using
    Particles", ch. 5; the mesh is periodic, so points outside the cube wrap around.
    """
    _check_box(box_size, n_mesh)
    order = _order(scheme)
    cells = _cells(positions, box_size, int(n_mesh), origin)
    if weights is None:
        w = np.ones(cells.shape[0], dtype=np.float64)
    else:
        w = np.ascontiguousarray(weights, dtype=np.float64)
        if w.shape != (cells.shape[0],):
            raise InputError(f"weights must have shape ({cells.shape[0]},) to match positions; "
                             f"got shape {w.shape}")
        if not np.all(np.isfinite(w)):
            raise InputError(f"weights contain {int(np.count_nonzero(~np.isfinite(w)))} NaN "
                             "or infinite values")
    mesh = np.zeros((int(n_mesh),) * 3, dtype=dtype)
    _PAINT[order](cells, w, mesh)
    return mesh


def interpolate(
    field: np.ndarray,
    positions: np.ndarray,
    box_size: float,
    scheme: str = "cic",
    origin: float | np.ndarray = 0.0,
) -> np.ndarray:
    """Read a mesh field at arbitrary positions with the same kernel used for painting.

    Parameters
    ----------
    field : ndarray of float, shape (n, n, n)
        Field values at the mesh nodes.
    positions : ndarray of float, shape (N, 3)
        Positions in Mpc/h.
    box_size : float
        Side of the periodic cube in Mpc/h.
    scheme : {"ngp", "cic", "tsc"}
        Interpolation kernel.
    origin : float or ndarray of shape (3,)
        Position of mesh node (0, 0, 0) in Mpc/h.

    Returns
    -------
    ndarray of float64, shape (N,)
    """
    n = _check_field(field)
    _check_box(box_size, n)
    order = _order(scheme)
    cells = _cells(positions, box_size, n, origin)
    out = np.empty(cells.shape[0], dtype=np.float64)
    _READ[order](cells, np.ascontiguousarray(field), out)
    return out


def interpolate_vector(
    fields: np.ndarray,
    positions: np.ndarray,
    box_size: float,
    scheme: str = "cic",
    origin: float | np.ndarray = 0.0,
) -> np.ndarray:
    """Read a vector field stored as (3, n, n, n) at positions; returns (N, 3) float64."""
    fields = np.asarray(fields)
    if fields.ndim != 4 or fields.shape[0] != 3:
        raise InputError(f"vector field must have shape (3, n, n, n); got {fields.shape}")
    return np.stack([interpolate(fields[a], positions, box_size, scheme, origin)
                     for a in range(3)], axis=1)


def density_contrast(mesh: np.ndarray, mean: float | None = None) -> np.ndarray:
    """Return ``mesh / mean - 1`` (a new array of the same dtype).

    Parameters
    ----------
    mesh : ndarray, shape (n, n, n)
        Painted weights.
    mean : float, optional
        Expected weight per cell; default the mesh mean.
    """
    m = float(mesh.mean()) if mean is None else float(mean)
    if not m > 0:
        raise InputError(f"cannot form a density contrast: mean weight per cell is {m}; "
                         "the painted mesh is empty or the given mean is not positive")
    out = mesh / mesh.dtype.type(m)
    out -= 1
    return out


def wavenumbers(n_mesh: int, box_size: float, dtype: type = np.float64):
    """Wavevector components of the real-FFT layout, in h/Mpc.

    Returns
    -------
    kx, ky, kz : ndarray
        Shapes (n, 1, 1), (1, n, 1), (1, 1, n // 2 + 1); they broadcast to the transform.
    """
    _check_box(box_size, n_mesh)
    n = int(n_mesh)
    fund = 2 * np.pi / box_size
    k_full = (np.fft.fftfreq(n, d=1.0 / n) * fund).astype(dtype)
    k_half = (np.fft.rfftfreq(n, d=1.0 / n) * fund).astype(dtype)
    return k_full[:, None, None], k_full[None, :, None], k_half[None, None, :]


def k_squared(n_mesh: int, box_size: float, dtype: type = np.float64) -> np.ndarray:
    """|k|^2 on the real-FFT layout, (h/Mpc)^2, shape (n, n, n // 2 + 1)."""
    kx, ky, kz = wavenumbers(n_mesh, box_size, dtype)
    return kx**2 + ky**2 + kz**2


def to_fourier(field: np.ndarray, workers: int | None = None) -> np.ndarray:
    """Real-to-complex FFT of a cubic mesh (numpy scaling: no factor on the forward)."""
    _check_field(field)
    return scipy.fft.rfftn(field, workers=_workers(workers))


def to_real(field_k: np.ndarray, n_mesh: int, workers: int | None = None) -> np.ndarray:
    """Inverse of :func:`to_fourier` for a mesh of ``n_mesh`` nodes per side."""
    n = int(n_mesh)
    if field_k.shape != (n, n, n // 2 + 1):
        raise InputError(f"Fourier field must have shape {(n, n, n // 2 + 1)} for n_mesh={n}; "
                         f"got {field_k.shape}")
    return scipy.fft.irfftn(field_k, s=(n, n, n), workers=_workers(workers))


def assignment_window(n_mesh: int, box_size: float, scheme: str = "cic") -> np.ndarray:
    """Fourier window of a mass-assignment scheme on the real-FFT layout.

    Returns
    -------
    ndarray of float64, shape (n, n, n // 2 + 1)
        ``W(k) = prod_i [sinc(k_i H / 2)]^p`` with H the cell size and p = 1, 2, 3 for
        NGP, CIC, TSC.

    Notes
    -----
    Hockney & Eastwood (1981) ch. 5; Jing (2005), ApJ 620, 559, eq. 18 [from memory].
    """
    p = _order(scheme)
    h = cell_size(box_size, n_mesh)
    kx, ky, kz = wavenumbers(n_mesh, box_size)
    # numpy's sinc is sin(pi x)/(pi x); k H / 2 = pi x  =>  x = k H / (2 pi)
    w = (np.sinc(kx * h / (2 * np.pi)) * np.sinc(ky * h / (2 * np.pi))
         * np.sinc(kz * h / (2 * np.pi)))
    return w**p


def compensate(field_k: np.ndarray, box_size: float, scheme: str = "cic") -> np.ndarray:
    """Divide a transformed painted field by its assignment window (in place; also returned)."""
    n = field_k.shape[0]
    w = assignment_window(n, box_size, scheme)
    field_k /= w.astype(field_k.real.dtype)
    return field_k


def gaussian_smooth_fourier(field_k: np.ndarray, box_size: float, radius: float) -> np.ndarray:
    """Multiply a transformed field by ``exp(-k^2 R^2 / 2)`` (in place; also returned).

    Parameters
    ----------
    radius : float
        Smoothing length R in Mpc/h (0 leaves the field unchanged).
    """
    if not np.isfinite(radius) or radius < 0:
        raise InputError(f"smoothing radius must be >= 0 Mpc/h, got {radius!r}")
    if radius == 0:
        return field_k
    n = field_k.shape[0]
    k2 = k_squared(n, box_size, field_k.real.dtype)
    field_k *= np.exp(-0.5 * k2 * radius**2)
    return field_k


def gaussian_smooth(field: np.ndarray, box_size: float, radius: float,
                    workers: int | None = None) -> np.ndarray:
    """Convolve a real mesh field with a normalised Gaussian of width ``radius`` (Mpc/h)."""
    n = _check_field(field)
    fk = gaussian_smooth_fourier(to_fourier(field, workers), box_size, radius)
    return to_real(fk, n, workers).astype(field.dtype, copy=False)


def gradient(field: np.ndarray, box_size: float, workers: int | None = None) -> np.ndarray:
    """Spectral gradient of a real periodic field; returns (3, n, n, n), units field per Mpc/h.

    The Nyquist component of each axis is zeroed (its derivative is not real-valued).
    """
    n = _check_field(field)
    fk = to_fourier(field, workers)
    ks = derivative_wavenumbers(n, box_size, fk.real.dtype)
    out = np.empty((3,) + field.shape, dtype=field.dtype)
    for a in range(3):
        out[a] = to_real(1j * ks[a] * fk, n, workers)
    return out


def derivative_wavenumbers(n: int, box_size: float, dtype: type = np.float64):
    """Wavevector components (h/Mpc) for spectral derivatives, with the Nyquist planes zeroed.

    A derivative's Nyquist mode has no well-defined sign on an even mesh; zeroing it keeps
    gradients of real fields real (common practice).
    """
    kx, ky, kz = wavenumbers(n, box_size, dtype)
    if n % 2 == 0:
        kx = kx.copy()
        ky = ky.copy()
        kz = kz.copy()
        kx[n // 2] = 0
        ky[:, n // 2] = 0
        kz[:, :, n // 2] = 0
    return kx, ky, kz


def displacement_fourier(delta_k: np.ndarray, box_size: float, workers: int | None = None,
                         stretch: tuple[float, float, float] = (1.0, 1.0, 1.0)) -> np.ndarray:
    """Zel'dovich displacement from a transformed density contrast.

    Parameters
    ----------
    delta_k : ndarray of complex, shape (n, n, n // 2 + 1)
        Transform of the density contrast (numpy convention).
    box_size : float
        Side of the cube in Mpc/h.
    stretch : tuple of 3 floats
        Advanced: per-axis factors a_i for a field that lives in coordinates x_i = x_true,i / a_i
        (an anisotropically rescaled box). The displacement is computed with the true
        wavevector k_i / a_i and returned in rescaled units (divided by a_i).

    Returns
    -------
    ndarray, shape (3, n, n, n)
        psi in Mpc/h with ``div psi = -delta`` (the k = 0 and Nyquist modes set to zero).

    Notes
    -----
    First-order Lagrangian perturbation theory: psi_k = i k delta_k / k^2
    (Zel'dovich 1970, A&A 5, 84; e.g. Bernardeau et al. 2002, Phys. Rep. 367, 1, sec. 2.5).
    """
    n = delta_k.shape[0]
    out = np.empty((3, n, n, n), dtype=delta_k.real.dtype)
    for i in range(3):
        out[i] = displacement_component(delta_k, box_size, i, workers, stretch)
    return out


def displacement_component(delta_k: np.ndarray, box_size: float, axis: int,
                           workers: int | None = None,
                           stretch: tuple[float, float, float] = (1.0, 1.0, 1.0)) -> np.ndarray:
    """One Cartesian component (``axis`` 0, 1, 2) of :func:`displacement_fourier`, for callers
    that cannot hold all three on the mesh at once.

    Returns
    -------
    ndarray, shape (n, n, n)
        psi_axis in Mpc/h (same values as ``displacement_fourier(...)[axis]``).
    """
    n = delta_k.shape[0]
    ks = derivative_wavenumbers(n, box_size, delta_k.real.dtype)
    a = [float(s) for s in stretch]
    kx, ky, kz = wavenumbers(n, box_size, delta_k.real.dtype)
    k2 = (kx / a[0]) ** 2 + (ky / a[1]) ** 2 + (kz / a[2]) ** 2
    k2[0, 0, 0] = 1.0
    c = np.reciprocal(k2, out=k2)
    c[0, 0, 0] = 0.0
    c *= ks[axis] / a[axis]
    # i c delta_k = (-c Im delta_k, c Re delta_k), written part by part to spare the mesh-size
    # complex temporaries (the same values as the complex product)
    field_k = np.empty_like(delta_k)
    field_k.real = c * delta_k.imag
    np.negative(field_k.real, out=field_k.real)
    field_k.imag = c * delta_k.real
    del c, k2
    return to_real(field_k, n, workers) / a[axis]


def displacement(delta: np.ndarray, box_size: float, smoothing: float = 0.0,
                 workers: int | None = None) -> np.ndarray:
    """Zel'dovich displacement (3, n, n, n) in Mpc/h of a real density-contrast mesh.

    Parameters
    ----------
    delta : ndarray, shape (n, n, n)
        Density contrast on the mesh.
    box_size : float
        Side of the cube in Mpc/h.
    smoothing : float
        Gaussian smoothing length in Mpc/h applied to delta first (0 = none).

    Notes
    -----
    Solves div psi = -delta with psi curl-free (Zel'dovich 1970); see
    :func:`displacement_fourier`.
    """
    _check_field(delta, "delta")
    fk = gaussian_smooth_fourier(to_fourier(delta, workers), box_size, smoothing)
    return displacement_fourier(fk, box_size, workers)
