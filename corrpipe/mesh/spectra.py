"""Power-spectrum and correlation-function multipoles measured on a periodic mesh.

The conventions (mesh layout, Fourier sign and scaling, units) are those of
:mod:`corrpipe.mesh.grid`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from corrpipe.errors import InputError
from corrpipe.mesh.grid import (_check_field, _order, assignment_window, cell_size, to_fourier,
                                 to_real, wavenumbers)

__all__ = ["shot_noise_window", "PowerMultipoles", "power_multipoles", "correlation_multipoles"]



@dataclass(frozen=True)
class PowerMultipoles:
    """Binned multipoles of a mesh power spectrum.

    Attributes
    ----------
    k : ndarray, shape (n_k,)
        Mode-weighted mean |k| per bin, h/Mpc (NaN for empty bins).
    ells : tuple of int
        Multipole orders.
    power : ndarray, shape (n_ells, n_k)
        P_ell(k) in (Mpc/h)^3.
    n_modes : ndarray, shape (n_k,)
        Number of Fourier modes in each bin (both k and -k counted).
    """

    k: np.ndarray
    ells: tuple
    power: np.ndarray
    n_modes: np.ndarray


def shot_noise_window(n_mesh: int, box_size: float, scheme: str = "cic") -> np.ndarray:
    """Aliased shot-noise window sum_n W^2(k + 2 k_N n) of a mass-assignment scheme.

    Returns
    -------
    ndarray of float64, shape (n, n, n // 2 + 1)
        prod_i C(s_i), s_i = sin(k_i H / 2), with C = 1 (NGP), 1 - 2 s^2 / 3 (CIC),
        1 - s^2 + 2 s^4 / 15 (TSC).

    Notes
    -----
    Jing 2005, ApJ 620, 559, eq. 20 [from memory]; the closed forms follow from summing the
    aliases of sinc^(2p) (common practice).
    """
    p = _order(scheme)
    h = cell_size(box_size, n_mesh)
    out = np.ones((n_mesh, n_mesh, n_mesh // 2 + 1))
    for k in wavenumbers(n_mesh, box_size):
        s2 = np.sin(0.5 * k * h) ** 2
        if p == 2:
            out = out * (1.0 - 2.0 / 3.0 * s2)
        elif p == 3:
            out = out * (1.0 - s2 + 2.0 / 15.0 * s2**2)
    return out


def _mesh_power(delta, box_size, scheme, shot_noise, other, workers, other_scheme=None):
    """|F|^2 V / n^6 (or the cross term), shot noise removed, window deconvolved."""
    n = delta.shape[0]
    f1 = to_fourier(delta, workers)
    if other is None:
        p3 = f1.real.astype(np.float64) ** 2 + f1.imag.astype(np.float64) ** 2
    else:
        f2 = to_fourier(other, workers)
        p3 = (f1 * np.conj(f2)).real.astype(np.float64)
        del f2
    del f1
    p3 *= box_size**3 / float(n) ** 6
    if other is None and shot_noise:
        if scheme is None:
            p3 -= shot_noise
        else:
            p3 -= shot_noise * shot_noise_window(n, box_size, scheme)
    if other is None:
        if scheme is not None:
            p3 /= assignment_window(n, box_size, scheme) ** 2
        return p3
    if scheme is not None:
        p3 /= assignment_window(n, box_size, scheme)
    if other_scheme is not None:
        p3 /= assignment_window(n, box_size, other_scheme)
    return p3


def _mode_multiplicity(n: int) -> np.ndarray:
    m = np.full(n // 2 + 1, 2.0)
    m[0] = 1.0
    if n % 2 == 0:
        m[-1] = 1.0
    return m[None, None, :]


def power_multipoles(
    delta: np.ndarray,
    box_size: float,
    k_edges: np.ndarray,
    ells: tuple = (0, 2, 4),
    los_axis: int = 2,
    scheme: str | None = "cic",
    shot_noise: float = 0.0,
    other: np.ndarray | None = None,
    other_scheme: str | None = "same",
    workers: int | None = None,
) -> PowerMultipoles:
    """Measure P_ell(k) of a density-contrast mesh (or the cross-spectrum with ``other``).

    Parameters
    ----------
    delta : ndarray, shape (n, n, n)
        Density contrast.
    box_size : float
        Box side in Mpc/h.
    k_edges : ndarray
        Bin edges in |k|, h/Mpc.
    ells : tuple of int
        Multipoles to measure.
    los_axis : int
        Fixed line-of-sight axis (plane-parallel).
    scheme : {"ngp", "cic", "tsc"} or None
        Assignment window to deconvolve (None: none).
    shot_noise : float
        Poisson shot noise of the painted points, (Mpc/h)^3 (1/nbar for unit weights;
        sum w^2 V / (sum w)^2 in general). Subtracted with its aliased window (see
        :func:`shot_noise_window`) before the assignment window is deconvolved; ignored for
        cross-spectra.
    other : ndarray, shape (n, n, n), optional
        Second field for a cross-spectrum Re[F1 F2*].
    other_scheme : str or None
        Window to deconvolve from ``other``: ``"same"`` (default) uses ``scheme``; None for a
        field that was not painted (e.g. a linear density generated on the mesh).

    Returns
    -------
    PowerMultipoles

    Notes
    -----
    P_ell(k) = (2 ell + 1) <P(k, mu) L_ell(mu)> over the modes of each shell (e.g. Hamilton
    1992; Kaiser 1987 for the plane-parallel mu). Modes with k_z > 0 on the half axis are
    counted twice so the average runs over the full sphere.
    """
    n = _check_field(delta, "delta")
    if other is not None and other.shape != delta.shape:
        raise InputError(f"cross-spectrum fields differ in shape: {delta.shape} vs {other.shape}")
    if other_scheme == "same":
        other_scheme = scheme
    p3 = _mesh_power(delta, box_size, scheme, shot_noise, other, workers, other_scheme)
    kx, ky, kz = wavenumbers(n, box_size)
    kmag = np.sqrt(kx**2 + ky**2 + kz**2)
    k_los = (kx, ky, kz)[los_axis]
    with np.errstate(invalid="ignore", divide="ignore"):
        mu = np.where(kmag > 0, k_los / np.where(kmag > 0, kmag, 1.0), 0.0)
    mult = np.broadcast_to(_mode_multiplicity(n), p3.shape)
    edges = np.asarray(k_edges, dtype=np.float64)
    idx = np.digitize(kmag.ravel(), edges) - 1
    n_bins = edges.size - 1
    good = (idx >= 0) & (idx < n_bins) & (kmag.ravel() > 0)
    idx = idx[good]
    w = mult.ravel()[good]
    counts = np.bincount(idx, weights=w, minlength=n_bins)
    ksum = np.bincount(idx, weights=w * kmag.ravel()[good], minlength=n_bins)
    mu_f = np.broadcast_to(mu, p3.shape).ravel()[good]
    p_f = p3.ravel()[good]
    out = np.empty((len(ells), n_bins))
    with np.errstate(invalid="ignore", divide="ignore"):
        for i, ell in enumerate(ells):
            leg = np.polynomial.legendre.Legendre.basis(int(ell))(mu_f)
            s = np.bincount(idx, weights=w * p_f * leg, minlength=n_bins)
            out[i] = (2 * ell + 1) * s / counts
        kmean = ksum / counts
    return PowerMultipoles(k=kmean, ells=tuple(int(e) for e in ells), power=out,
                           n_modes=counts)


def correlation_multipoles(
    delta: np.ndarray,
    box_size: float,
    s_edges: np.ndarray,
    ells: tuple = (0, 2, 4),
    los_axis: int = 2,
    scheme: str | None = None,
    shot_noise: float = 0.0,
    workers: int | None = None,
):
    """Correlation-function multipoles of a density-contrast mesh, by FFT.

    Parameters
    ----------
    delta : ndarray, shape (n, n, n)
        Density contrast.
    box_size : float
        Box side in Mpc/h.
    s_edges : ndarray
        Separation bin edges in Mpc/h (below box_size / 2).
    ells : tuple of int
        Multipoles.
    los_axis : int
        Fixed line-of-sight axis.
    scheme : {"ngp", "cic", "tsc"} or None
        Assignment window to deconvolve before forming C(r) (None: none).
    shot_noise : float
        Poisson shot noise to subtract, (Mpc/h)^3, as in :func:`power_multipoles`. Without
        it the shot noise sits at lags below ~2 cells (CIC) but spreads further once the
        window is deconvolved, so give both or neither.

    Returns
    -------
    s_mean : ndarray, shape (n_s,)
        Mean separation of the mesh lags in each bin, Mpc/h.
    xi : ndarray, shape (n_ells, n_s)
        xi_ell(s).

    Notes
    -----
    The mesh autocorrelation C(r) = <delta(x) delta(x + r)> is the inverse transform of
    |delta_k|^2 (Wiener-Khinchin theorem); xi_ell = (2 ell + 1) <C L_ell(mu)> over the lags of
    each shell. Without ``scheme`` the painting window smooths C on the scale of a cell, so
    use it well above a few cells. Poisson shot noise sits at zero lag (and, for CIC/TSC, the adjacent lags).
    """
    n = _check_field(delta, "delta")
    p3 = _mesh_power(delta, box_size, scheme, shot_noise, None, workers)
    # C(r) = (1/V) sum_k P(k) exp(i k r)  =  irfftn(P) n^3 / V
    c = to_real(p3.astype(np.complex128), n, workers) * (float(n) ** 3 / box_size**3)
    del p3
    h = box_size / n
    lag = np.fft.fftfreq(n, d=1.0 / n) * h
    rx, ry, rz = lag[:, None, None], lag[None, :, None], lag[None, None, :]
    r = np.sqrt(rx**2 + ry**2 + rz**2)
    r_los = np.broadcast_to((rx, ry, rz)[los_axis], r.shape)
    edges = np.asarray(s_edges, dtype=np.float64)
    sel = (r >= edges[0]) & (r < edges[-1])
    rr = r[sel]
    mu = r_los[sel] / rr
    cc = c[sel]
    idx = np.digitize(rr, edges) - 1
    nb = edges.size - 1
    counts = np.bincount(idx, minlength=nb).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        s_mean = np.bincount(idx, weights=rr, minlength=nb) / counts
        xi = np.empty((len(ells), nb))
        for i, ell in enumerate(ells):
            leg = np.polynomial.legendre.Legendre.basis(int(ell))(mu)
            xi[i] = (2 * ell + 1) * np.bincount(idx, weights=cc * leg, minlength=nb) / counts
    return s_mean, xi
