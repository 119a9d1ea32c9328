"""Periodic-box mock catalogues: lognormal (Coles & Jones 1991) and Zel'dovich (1970).

Both generators return a :class:`BoxMock`: real-space positions plus each object's linear
Lagrangian displacement psi, from which redshift-space positions follow as
``s = x + f (psi . n) n`` (plane-parallel along a box axis here; radial in
:mod:`corrpipe.mocks.survey`). Positions and displacements are in Mpc/h.

A known anisotropic dilation is injected by generating the box in rescaled coordinates
(see :mod:`corrpipe.mocks.fields`): the box is the cube an analysis with a wrong fiducial
distance scale would see, with BAO shifted by 1/alpha_par along ``los_axis`` and by
1/alpha_perp across it. An analysis whose template uses the same input P(k) then recovers
exactly (alpha_par, alpha_perp).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from scipy import optimize, special
from tqdm.auto import tqdm

from corrpipe import mesh
from corrpipe.errors import InputError
from corrpipe.mocks.settings import MIN_NYQUIST_K
from corrpipe.mocks.fields import (gaussian_field_fourier, lognormal_gaussian_power,
                                   mesh_variance, power_on_mesh, white_noise_fourier)
from corrpipe.terminal import show_bars

__all__ = [
    "BoxMock",
    "linear_density",
    "lognormal_box",
    "zeldovich_box",
    "lagrangian_bias_for",
    "clipped_linear_bias",
    "displacement_variance",
    "MIN_NYQUIST_K",
]



@dataclass(frozen=True)
class BoxMock:
    """A mock galaxy catalogue in a periodic cube.

    Attributes
    ----------
    positions : ndarray of float64, shape (N, 3)
        Real-space positions in [0, box_size), Mpc/h.
    displacement : ndarray of float64, shape (N, 3)
        Linear (first-order) displacement psi of each object, Mpc/h; its peculiar velocity is
        v = a H f psi, so the redshift-space shift is f (psi . n) n.
    box_size : float
        Side of the cube, Mpc/h.
    growth_rate : float
        Linear growth rate f = dlnD/dlna used for redshift-space distortions.
    bias : float
        Target linear (Eulerian) bias.
    nbar : float
        Target mean number density, (h/Mpc)^3.
    kind : str
        ``"lognormal"`` or ``"zeldovich"``.
    alpha_par, alpha_perp : float
        Injected dilation (1, 1 for none).
    los_axis : int
        Axis the dilation's alpha_par acts along, and the default line of sight.
    seed : int
        Seed the mock was drawn from.
    meta : dict
        Diagnostics (clipped lognormal power, effective Lagrangian bias, rms displacement...).
    """

    positions: np.ndarray
    displacement: np.ndarray
    box_size: float
    growth_rate: float
    bias: float
    nbar: float
    kind: str
    alpha_par: float = 1.0
    alpha_perp: float = 1.0
    los_axis: int = 2
    seed: int = -1
    meta: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.positions.shape[0])

    def redshift_space_positions(self, los_axis: int | None = None) -> np.ndarray:
        """Positions shifted by f psi along a box axis (plane-parallel), wrapped into the box.

        Notes
        -----
        Linear redshift-space mapping s = x + f (psi . z) z (Kaiser 1987).
        """
        axis = self.los_axis if los_axis is None else int(los_axis)
        if axis not in (0, 1, 2):
            raise InputError(f"los_axis must be 0, 1 or 2 (x, y, z); got {los_axis!r}")
        out = self.positions.copy()
        out[:, axis] += self.growth_rate * self.displacement[:, axis]
        np.mod(out, self.box_size, out=out)
        out[out >= self.box_size] = 0.0  # float round-off at the upper edge
        return out


def _check_common(box_size, n_mesh, nbar, bias, growth_rate, alpha_par, alpha_perp, los_axis):
    if not np.isfinite(box_size) or box_size <= 0:
        raise InputError(f"mock box_size must be a positive length in Mpc/h, got {box_size!r}")
    if int(n_mesh) != n_mesh or n_mesh < 8:
        raise InputError(f"mock n_mesh must be an integer >= 8, got {n_mesh!r}")
    k_nyq = np.pi * n_mesh / box_size
    if k_nyq < MIN_NYQUIST_K:
        need = int(np.ceil(MIN_NYQUIST_K * box_size / np.pi))
        raise InputError(f"mock mesh too coarse for the box: n_mesh = {n_mesh} over "
                         f"{box_size:g} Mpc/h gives cells of {box_size / n_mesh:.1f} Mpc/h and a "
                         f"Nyquist wavenumber of {k_nyq:.3f} h/Mpc, below {MIN_NYQUIST_K} h/Mpc "
                         f"needed for BAO scales; use n_mesh >= {need}")
    if not np.isfinite(nbar) or nbar <= 0:
        raise InputError(f"mock number density nbar must be positive, in (h/Mpc)^3; got "
                         f"{nbar!r} (typical galaxy samples have 1e-4 to 1e-3)")
    if not np.isfinite(bias) or bias <= 0:
        raise InputError(f"mock bias must be > 0 (a linear galaxy bias, typically 1-3); got "
                         f"{bias!r}")
    if not np.isfinite(growth_rate) or growth_rate < 0:
        raise InputError(f"mock growth_rate f must be >= 0 (0 switches RSD off); got "
                         f"{growth_rate!r}")
    for name, a in (("alpha_par", alpha_par), ("alpha_perp", alpha_perp)):
        if not np.isfinite(a) or not 0.5 <= a <= 2.0:
            raise InputError(f"mock {name} must be in [0.5, 2]; got {a!r}")
    if los_axis not in (0, 1, 2):
        raise InputError(f"mock los_axis must be 0, 1 or 2 (x, y, z); got {los_axis!r}")


def _stretch(alpha_par, alpha_perp, los_axis):
    a = [float(alpha_perp)] * 3
    a[los_axis] = float(alpha_par)
    return tuple(a)


def _seed_and_rng(seed):
    if isinstance(seed, np.random.Generator):
        return -1, seed
    if seed is None or int(seed) < 0:
        raise InputError(f"mock seed must be a non-negative integer or a numpy Generator; got "
                         f"{seed!r}")
    return int(seed), np.random.default_rng(int(seed))


def displacement_variance(power_mesh: np.ndarray, box_size: float) -> float:
    """1-D variance sigma_psi^2 (Mpc/h)^2 of the Zel'dovich displacement of a mesh field.

    Notes
    -----
    sigma_psi^2 = (1/3) sum_k P(k) / k^2 / V over the mesh modes, the discrete form of
    (1 / 6 pi^2) int P(k) dk (e.g. Eisenstein, Seo & White 2007, ApJ 664, 675 [from memory];
    Matsubara 2008, PRD 77, 063530, eq. 29 [from memory]).
    """
    n = power_mesh.shape[0]
    k2 = mesh.k_squared(n, box_size)
    k2[0, 0, 0] = np.inf
    return mesh_variance(power_mesh / k2, box_size) / 3.0


def linear_density(power: Callable, box_size: float, n_mesh: int, seed: int, *,
                   alpha_par: float = 1.0, alpha_perp: float = 1.0, los_axis: int = 2,
                   dtype=np.float64) -> np.ndarray:
    """The linear matter density mesh (n, n, n) behind the mocks drawn with integer ``seed``.

    :func:`lognormal_box` (velocities) and :func:`zeldovich_box` (displacements) draw this
    same field first from ``numpy.random.default_rng(seed)``, so it can be regenerated for
    cross-correlation checks and reconstruction tests.
    """
    if isinstance(seed, np.random.Generator):
        raise InputError("linear_density needs the integer seed the mock was drawn with")
    _, rng = _seed_and_rng(seed)
    stretch = _stretch(alpha_par, alpha_perp, los_axis)
    p_matter = power_on_mesh(power, int(n_mesh), box_size, stretch)
    noise = white_noise_fourier(int(n_mesh), rng, dtype)
    return mesh.to_real(gaussian_field_fourier(p_matter.astype(dtype), noise, box_size),
                        int(n_mesh))


def lognormal_box(
    power: Callable,
    box_size: float,
    n_mesh: int,
    nbar: float,
    bias: float,
    growth_rate: float,
    seed,
    *,
    alpha_par: float = 1.0,
    alpha_perp: float = 1.0,
    los_axis: int = 2,
    dtype=np.float64,
    progress: bool = True,
) -> BoxMock:
    """Draw a lognormal galaxy mock in a periodic box.

    Parameters
    ----------
    power : callable
        Linear matter power at the mock redshift, ``power(k) -> P``; k in h/Mpc, P in (Mpc/h)^3.
    box_size : float
        Side of the cube, Mpc/h.
    n_mesh : int
        Mesh nodes per side (cell size box_size / n_mesh).
    nbar : float
        Mean number density, (h/Mpc)^3.
    bias : float
        Linear galaxy bias b; the galaxy field has correlation b^2 xi_lin.
    growth_rate : float
        Linear growth rate f (0: no velocities).
    seed : int or numpy.random.Generator
        Randomness source.
    alpha_par, alpha_perp : float
        Injected dilation along / across ``los_axis`` (module notes).
    los_axis : int
        Axis of alpha_par and default line of sight.
    dtype : numpy dtype
        Mesh precision (float32 halves memory). The white noise is drawn in this precision,
        so a seed gives the same mock only at the same precision.
    progress : bool
        Show a progress bar.

    Returns
    -------
    BoxMock

    Notes
    -----
    Coles & Jones 1991, MNRAS 248, 1: the galaxy density is 1 + delta_g = exp(G - sigma_G^2/2)
    with G Gaussian of correlation ln(1 + b^2 xi_lin) (REFERENCES sec. 9); negative modes of
    the Gaussian power are clipped to zero (their share is ``meta["clipped_fraction"]``).
    Galaxies are Poisson draws of mean nbar v (1 + delta_g) per cell, uniform in the cell.
    Displacements come from the linear matter field driven by the same white noise,
    psi_k = i k delta_k / k^2, read at each galaxy by CIC; the velocity is a H f psi.
    """
    _check_common(box_size, n_mesh, nbar, bias, growth_rate, alpha_par, alpha_perp, los_axis)
    seed_int, rng = _seed_and_rng(seed)
    n = int(n_mesh)
    stretch = _stretch(alpha_par, alpha_perp, los_axis)
    bar = tqdm(total=5, desc="lognormal mock", disable=not show_bars(progress), leave=False)
    p_matter = power_on_mesh(power, n, box_size, stretch)
    p_gauss, clipped = lognormal_gaussian_power(bias**2 * p_matter, box_size)
    var_gauss = mesh_variance(p_gauss, box_size)
    bar.update()
    noise = white_noise_fourier(n, rng, dtype)
    g_field = mesh.to_real(gaussian_field_fourier(p_gauss.astype(dtype), noise, box_size), n)
    del p_gauss
    bar.update()
    cell = box_size / n
    lam = nbar * cell**3 * np.exp(g_field - 0.5 * var_gauss)
    del g_field
    counts = rng.poisson(lam.ravel())
    del lam
    bar.update()
    n_gal = int(counts.sum())
    nodes = np.repeat(np.arange(n**3, dtype=np.int64), counts)
    del counts
    ijk = np.stack(np.unravel_index(nodes, (n, n, n)), axis=1).astype(np.float64)
    del nodes
    pos = (ijk - 0.5 + rng.random((n_gal, 3))) * cell
    del ijk
    np.mod(pos, box_size, out=pos)
    pos[pos >= box_size] = 0.0
    bar.update()
    if growth_rate > 0:
        delta_m_k = gaussian_field_fourier(p_matter.astype(dtype), noise, box_size)
        psi_mesh = mesh.displacement_fourier(delta_m_k, box_size, stretch=stretch)
        del delta_m_k
        psi = mesh.interpolate_vector(psi_mesh, pos, box_size, "cic")
        del psi_mesh
    else:
        psi = np.zeros_like(pos)
    bar.update()
    bar.close()
    meta = {"clipped_fraction": clipped, "gaussian_variance": var_gauss,
            "n_mesh": n, "sigma_psi": float(np.sqrt(displacement_variance(p_matter, box_size)))}
    return BoxMock(positions=pos, displacement=psi, box_size=float(box_size),
                   growth_rate=float(growth_rate), bias=float(bias), nbar=float(nbar),
                   kind="lognormal", alpha_par=float(alpha_par), alpha_perp=float(alpha_perp),
                   los_axis=int(los_axis), seed=seed_int, meta=meta)


def clipped_linear_bias(b_lagrangian: float, sigma: float) -> float:
    """Large-scale Lagrangian bias of selection weights max(0, 1 + b_L delta), delta ~ N(0, s^2).

    Notes
    -----
    For a local weight w(delta) of a Gaussian field the cross-correlation with delta at large
    separation is <w'> / <w> times xi (Gaussian integration by parts, Stein 1981 [from
    memory]; the peak-background argument of e.g. Mo & White 1996). With y = 1 + b_L delta,
    <w'> = b_L P(y > 0) and <w> = E[y_+] = Phi(1/t) + t phi(1/t), t = |b_L| sigma.
    """
    t = abs(b_lagrangian) * sigma
    if t == 0:
        return float(b_lagrangian)
    u = 1.0 / t
    cdf = special.ndtr(u)
    pdf = np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)
    return float(b_lagrangian * cdf / (cdf + t * pdf))


def clipped_bias_moments(b_weight: float, sigma: float) -> tuple[float, float]:
    """Lagrangian bias moments (b1, b2) = (<w'>, <w''>) / <w> of weights max(0, 1 + b_w delta).

    Notes
    -----
    w'' = |b_w| delta_D(delta + 1/b_w), so <w''> = |b_w| phi(1/t) / sigma with t = |b_w|
    sigma; b1 is :func:`clipped_linear_bias`. These are the b1, b2 of the Zel'dovich
    prediction (:mod:`corrpipe.theory.zeldovich`) for mocks drawn by :func:`zeldovich_box`.
    """
    t = abs(b_weight) * sigma
    if t == 0:
        return float(b_weight), 0.0
    u = 1.0 / t
    pdf = np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)
    norm = special.ndtr(u) + t * pdf
    return clipped_linear_bias(b_weight, sigma), float(abs(b_weight) * pdf / sigma / norm)


def lagrangian_bias_for(bias: float, sigma: float) -> float:
    """Weight coefficient b_L whose clipped weights give Eulerian bias ``bias`` = 1 + b_eff.

    Raises
    ------
    InputError
        The bias cannot be reached with clipped linear weights at this field variance
        (the maximum effective Lagrangian bias is about 1.25 / sigma).
    """
    target = float(bias) - 1.0
    if target == 0:
        return 0.0
    sign = np.sign(target)
    best = clipped_linear_bias(sign * 1e6, sigma)
    if abs(target) >= abs(best) * 0.999:
        raise InputError(f"mock bias {bias} cannot be reached by Lagrangian sampling on this "
                         f"mesh: the linear field has rms {sigma:.3f} per cell, which allows an "
                         f"effective Lagrangian bias up to {abs(best):.3f} in size (Eulerian "
                         f"bias 1 {'+' if sign > 0 else '-'} {abs(best):.3f}); use a coarser "
                         "mesh, a smoothing length for the bias weights, or a smaller bias")
    return float(optimize.brentq(lambda b: clipped_linear_bias(b, sigma) - target,
                                 0.0, sign * 1e6, xtol=1e-12, rtol=1e-12))


def zeldovich_box(
    power: Callable,
    box_size: float,
    n_mesh: int,
    nbar: float,
    bias: float,
    growth_rate: float,
    seed,
    *,
    alpha_par: float = 1.0,
    alpha_perp: float = 1.0,
    los_axis: int = 2,
    bias_smoothing: float = 0.0,
    lagrangian_positions: str = "nodes",
    dtype=np.float64,
    progress: bool = True,
) -> BoxMock:
    """Draw a Zel'dovich (first-order LPT) galaxy mock in a periodic box.

    Parameters
    ----------
    power : callable
        Linear matter power at the mock redshift, ``power(k) -> P``; k in h/Mpc, P in (Mpc/h)^3.
    box_size : float
        Side of the cube, Mpc/h.
    n_mesh : int
        Mesh nodes per side; one particle starts at each node (n_mesh^3 particles).
    nbar : float
        Target number density of the galaxies, (h/Mpc)^3; must be below the particle
        density (n_mesh / box_size)^3.
    bias : float
        Target large-scale Eulerian bias b = 1 + b_L (Lagrangian bias b_L).
    growth_rate : float
        Linear growth rate f for the RSD shift f (psi . n) n.
    seed : int or numpy.random.Generator
        Randomness source.
    alpha_par, alpha_perp, los_axis
        Injected dilation, as in :func:`lognormal_box`.
    bias_smoothing : float
        Gaussian smoothing length (Mpc/h) of the field that sets the selection weights
        (0: the raw mesh field). Smoothing lowers the field rms, so larger biases can be
        reached, at the price of a scale-dependent bias exp(-k^2 R^2 / 2).
    lagrangian_positions : {"nodes", "cells"}
        "nodes": galaxies start on the mesh nodes (the lattice shows in pair counts when the
        displacements are small against the cell, e.g. at high redshift); "cells": each
        starts at a uniform position inside its node's cell and takes the displacement read
        there (CIC), which removes the lattice.
    dtype : numpy dtype
        Mesh precision (a seed gives the same mock only at the same precision).
    progress : bool
        Show a progress bar.

    Returns
    -------
    BoxMock
        ``meta`` holds the weight coefficient ``b_lagrangian_weight``, the expected effective
        Lagrangian bias, ``sigma_psi`` (1-D rms displacement, Mpc/h) and the fraction of
        capped selection probabilities.

    Notes
    -----
    Zel'dovich 1970, A&A 5, 84: x = q + psi(q), psi_k = i k delta_L,k / k^2. Galaxies are the
    particles kept with probability proportional to max(0, 1 + b_w delta_L(q)), with b_w
    chosen so that the large-scale Lagrangian bias <w'>/<w> equals b - 1
    (:func:`clipped_linear_bias`); Eulerian bias 1 + b_L (e.g. Matsubara 2008, PRD 78, 083519
    [from memory]). The bulk flows damp the BAO by exp(-k^2 sigma_psi^2 [1 + f(f+2) mu^2])
    in P(k) (Matsubara 2008, PRD 77, 063530 [from memory]).
    """
    _check_common(box_size, n_mesh, nbar, bias, growth_rate, alpha_par, alpha_perp, los_axis)
    seed_int, rng = _seed_and_rng(seed)
    n = int(n_mesh)
    cell = box_size / n
    base_prob = nbar * cell**3
    if base_prob >= 1.0:
        need = int(np.ceil(box_size * (2 * nbar) ** (1 / 3)))
        raise InputError(f"mock grid too coarse for the target density: {n}^3 particles in "
                         f"({box_size:g} Mpc/h)^3 give {1 / cell**3:.3g} per (Mpc/h)^3, not "
                         f"above nbar = {nbar:g}; use n_mesh >= {need} or a lower nbar")
    if not np.isfinite(bias_smoothing) or bias_smoothing < 0:
        raise InputError(f"bias_smoothing must be >= 0 Mpc/h, got {bias_smoothing!r}")
    if lagrangian_positions not in ("nodes", "cells"):
        raise InputError(f"lagrangian_positions must be 'nodes' or 'cells', got "
                         f"{lagrangian_positions!r}")
    stretch = _stretch(alpha_par, alpha_perp, los_axis)
    bar = tqdm(total=4, desc="Zel'dovich mock", disable=not show_bars(progress), leave=False)
    p_matter = power_on_mesh(power, n, box_size, stretch)
    sigma_psi = float(np.sqrt(displacement_variance(p_matter, box_size)))
    smooth = np.exp(-mesh.k_squared(n, box_size) * bias_smoothing**2) if bias_smoothing else 1.0
    sigma_w = float(np.sqrt(mesh_variance(p_matter * smooth if bias_smoothing else p_matter,
                                          box_size)))
    b_weight = lagrangian_bias_for(bias, sigma_w)
    noise = white_noise_fourier(n, rng, dtype)
    delta_k = gaussian_field_fourier(p_matter.astype(dtype), noise, box_size)
    del noise
    bar.update()
    del p_matter
    # selection weights max(0, 1 + b_w delta) turned into keep probabilities in place, and
    # drawn slab by slab (a generator's stream does not depend on how it is split), so the
    # mesh holds one real field here besides delta_k
    prob = mesh.to_real(mesh.gaussian_smooth_fourier(delta_k.copy(), box_size, bias_smoothing)
                        if bias_smoothing else delta_k, n).reshape(-1)
    prob *= b_weight
    prob += 1.0
    np.maximum(prob, 0.0, out=prob)
    mean_weight = prob.mean()
    prob *= base_prob
    prob /= mean_weight
    capped = float(np.mean(prob > 1.0))
    slab = n * n * max(1, n // 16)
    keep = np.concatenate([np.flatnonzero(rng.random(min(slab, prob.size - lo))
                                          < prob[lo:lo + slab]) + lo
                           for lo in range(0, prob.size, slab)])
    del prob
    bar.update()
    q = np.stack(np.unravel_index(keep, (n, n, n)), axis=1).astype(np.float64) * cell
    if lagrangian_positions == "cells":
        # a uniform Lagrangian position inside the node's cell, displacement read there
        # (CIC): no lattice of start points left in the pair counts
        q += (rng.random(q.shape) - 0.5) * cell
        np.mod(q, box_size, out=q)
        q[q >= box_size] = 0.0
    # one displacement component on the mesh at a time, read out at the start points
    psi = np.empty((keep.size, 3), dtype=np.float64)
    for a in range(3):
        psi_a = mesh.displacement_component(delta_k, box_size, a, stretch=stretch)
        if lagrangian_positions == "cells":
            psi[:, a] = mesh.interpolate(psi_a, q, box_size, "cic")
        else:
            psi[:, a] = psi_a.reshape(-1)[keep]
        del psi_a
    del delta_k
    bar.update()
    pos = q + psi
    np.mod(pos, box_size, out=pos)
    pos[pos >= box_size] = 0.0
    bar.update()
    bar.close()
    meta = {"b_lagrangian_weight": b_weight,
            "b_lagrangian_effective": clipped_linear_bias(b_weight, sigma_w),
            "sigma_weight_field": sigma_w, "sigma_psi": sigma_psi, "capped_fraction": capped,
            "n_mesh": n, "bias_smoothing": float(bias_smoothing),
            "lagrangian_positions": lagrangian_positions}
    return BoxMock(positions=pos, displacement=psi, box_size=float(box_size),
                   growth_rate=float(growth_rate), bias=float(bias), nbar=float(nbar),
                   kind="zeldovich", alpha_par=float(alpha_par), alpha_perp=float(alpha_perp),
                   los_axis=int(los_axis), seed=seed_int, meta=meta)
