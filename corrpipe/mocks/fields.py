"""Gaussian and lognormal random fields on a periodic mesh from a target power spectrum.

All fields here use the Fourier convention of :mod:`corrpipe.mesh` (numpy FFT scaling). A
field with power P(k) in (Mpc/h)^3 on a mesh of cell volume v = (L/n)^3 has transform
``F_k = W_k sqrt(P(k) / v)``, where ``W_k`` is the transform of unit white noise; the same
``W_k`` drives every field of one mock so that density and displacement are coherent.

A *stretch* ``a = (a_x, a_y, a_z)`` describes a box in rescaled coordinates
``x_i = x_true,i / a_i`` (the way an analysis in a wrong fiducial cosmology sees a true field):
the field is the true one read at ``a x``, so its power is ``P_true(k / a) / (a_x a_y a_z)``.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from corrpipe import mesh
from corrpipe.errors import InputError

__all__ = [
    "white_noise_fourier",
    "power_on_mesh",
    "gaussian_field_fourier",
    "lognormal_gaussian_power",
    "mesh_variance",
]


def white_noise_fourier(n_mesh: int, rng: np.random.Generator, dtype=np.float64) -> np.ndarray:
    """Transform of unit-variance Gaussian white noise on an n^3 mesh (shape (n, n, n//2+1))."""
    noise = rng.standard_normal((n_mesh,) * 3, dtype=dtype)
    return mesh.to_fourier(noise)


def power_on_mesh(power: Callable, n_mesh: int, box_size: float,
                  stretch=(1.0, 1.0, 1.0), dtype=np.float64) -> np.ndarray:
    """Evaluate ``power(k)`` on the real-FFT layout, with an optional anisotropic stretch.

    Parameters
    ----------
    power : callable
        ``power(k_hmpc) -> P`` in (Mpc/h)^3, vectorised over a 1-D array of k in h/Mpc.
    n_mesh : int
        Mesh nodes per side.
    box_size : float
        Box side in Mpc/h (in the rescaled coordinates when stretched).
    stretch : tuple of 3 floats
        Per-axis factors a_i (see the module notes); (1, 1, 1) for none.

    Returns
    -------
    ndarray, shape (n, n, n // 2 + 1)
        P on the mesh, (Mpc/h)^3, with the k = 0 mode set to zero.
    """
    a = np.asarray(stretch, dtype=np.float64)
    if a.shape != (3,) or not np.all(a > 0):
        raise InputError(f"stretch must be three positive factors, got {stretch!r}")
    kx, ky, kz = mesh.wavenumbers(n_mesh, box_size)
    # |k| depends on |k_x| and |k_y| only (the layout holds k and -k exactly), so evaluate it
    # on the quadrant |i_x|, |i_y| <= n/2 (a quarter of the mesh) and index it back
    n = int(n_mesh)
    fold = np.minimum(np.arange(n), n - np.arange(n))
    half = n // 2 + 1
    qx = np.abs(kx[:half])
    qy = np.abs(ky[:, :half])
    kmag = np.sqrt((qx / a[0]) ** 2 + (qy / a[1]) ** 2 + (kz / a[2]) ** 2)
    flat = kmag.ravel()
    uniq, inverse = np.unique(flat, return_inverse=True)
    values = np.zeros_like(uniq)
    pos = uniq > 0
    try:
        values[pos] = np.asarray(power(uniq[pos]), dtype=np.float64)
    except Exception as exc:  # a user callable: report what it was given
        raise InputError(f"the power-spectrum callable failed on an array of {pos.sum()} "
                         f"wavenumbers in h/Mpc ({exc}); it must accept a 1-D numpy array") \
            from exc
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        raise InputError("the power spectrum returned negative or non-finite values on the "
                         f"mesh wavenumbers ({uniq[pos][0]:.3g}-{uniq[-1]:.3g} h/Mpc); it must "
                         "be a non-negative P(k) in (Mpc/h)^3")
    quadrant = values[inverse].reshape(kmag.shape)
    out = quadrant[fold[:, None, None], fold[None, :, None], np.arange(kz.size)[None, None, :]]
    out /= float(np.prod(a))
    return out.astype(dtype, copy=False)


def gaussian_field_fourier(power_mesh: np.ndarray, noise_k: np.ndarray,
                           box_size: float) -> np.ndarray:
    """Transform of a Gaussian field with mesh power ``power_mesh`` driven by ``noise_k``.

    Parameters
    ----------
    power_mesh : ndarray, shape (n, n, n // 2 + 1)
        Target power on the mesh, (Mpc/h)^3.
    noise_k : ndarray of complex, same shape
        Transform of unit white noise (:func:`white_noise_fourier`).
    box_size : float
        Box side, Mpc/h.

    Notes
    -----
    <|F_k|^2> = n^3 P / v makes P(k) = V <|F_k|^2> / n^6, the estimator of
    :func:`corrpipe.mesh.power_multipoles` (common practice for Gaussian initial conditions).
    """
    n = power_mesh.shape[0]
    cell_volume = (box_size / n) ** 3
    amplitude = power_mesh / cell_volume
    np.sqrt(amplitude, out=amplitude)
    return noise_k * amplitude.astype(noise_k.real.dtype, copy=False)


def mesh_variance(power_mesh: np.ndarray, box_size: float) -> float:
    """Variance of a mesh field with power ``power_mesh``: sum over all modes of P / V."""
    n = power_mesh.shape[0]
    mult = np.full(n // 2 + 1, 2.0)
    mult[0] = 1.0
    if n % 2 == 0:
        mult[-1] = 1.0
    return float(np.sum(power_mesh * mult[None, None, :]) / box_size**3)


def lognormal_gaussian_power(target_power_mesh: np.ndarray, box_size: float) -> tuple:
    """Power of the Gaussian field whose exponential has the target correlation function.

    Parameters
    ----------
    target_power_mesh : ndarray, shape (n, n, n // 2 + 1)
        Target (galaxy) power on the mesh, (Mpc/h)^3.
    box_size : float
        Box side, Mpc/h.

    Returns
    -------
    power_gauss : ndarray, same shape
        Power of the Gaussian field G, (Mpc/h)^3, negative values clipped to zero.
    clipped_fraction : float
        Fraction of the target variance carried by the clipped negative modes (a measure of how
        far the target is from a valid lognormal field; below ~1e-3 is harmless).

    Raises
    ------
    InputError
        The target correlation reaches xi <= -1 somewhere (no lognormal field has it).

    Notes
    -----
    Coles & Jones 1991, MNRAS 248, 1: for delta = exp(G - sigma_G^2 / 2) - 1 with G Gaussian,
    1 + xi(r) = exp[xi_G(r)], so xi_G = ln(1 + xi) (REFERENCES sec. 9). xi is taken on the
    mesh lags by inverse FFT of the gridded power, xi(r) = (1/V) sum_k P(k) exp(i k.r).
    """
    n = target_power_mesh.shape[0]
    scale = n**3 / box_size**3
    xi = mesh.to_real(target_power_mesh.astype(np.complex128), n) * scale
    if xi.min() <= -1.0:
        raise InputError(f"the target correlation function reaches xi = {xi.min():.3f} <= -1 on "
                         "the mesh, which no lognormal field can have; lower the bias or the "
                         "amplitude, or use a coarser mesh")
    xi_gauss = np.log1p(xi)
    del xi
    p_gauss = mesh.to_fourier(xi_gauss).real / scale
    negative = p_gauss < 0
    total = mesh_variance(np.abs(p_gauss), box_size)
    clipped = mesh_variance(np.where(negative, -p_gauss, 0.0), box_size) / max(total, 1e-300)
    p_gauss[negative] = 0.0
    p_gauss[0, 0, 0] = 0.0
    return p_gauss.astype(target_power_mesh.dtype, copy=False), float(clipped)
