"""Reconstruction drivers: shift a box or a survey catalogue by the solved displacement."""

from __future__ import annotations

import logging

import numpy as np
from tqdm.auto import tqdm

from corrpipe import mesh
from corrpipe.errors import InputError
from corrpipe.recon.settings import ReconResult, ReconSettings
from corrpipe.recon.solver import (_as_positions, _as_weights, _displacement_at, _smoothing_kernel,
                                   box_displacement, box_geometry, survey_density_contrast,
                                   survey_displacement, survey_geometry)
from corrpipe.terminal import show_bars

__all__ = ["reconstruct_box", "reconstruct_survey"]

log = logging.getLogger(__name__)


# ----------------------------------------------------------------------------- shifts


def _rsd_term(psi_at: np.ndarray, positions: np.ndarray, growth_rate: float,
              los_axis: int | None) -> np.ndarray:
    """f (psi . n) n with n the fixed axis or the radial direction."""
    out = np.zeros_like(psi_at)
    if growth_rate == 0:
        return out
    if los_axis is not None:
        out[:, los_axis] = growth_rate * psi_at[:, los_axis]
        return out
    r2 = np.einsum("ij,ij->i", positions, positions)
    scale = np.zeros_like(r2)
    np.divide(growth_rate * np.einsum("ij,ij->i", psi_at, positions), r2, out=scale,
              where=r2 > 0)
    return positions * scale[:, None]


def _check_common(bias: float, growth_rate: float, settings: ReconSettings) -> None:
    if not isinstance(settings, ReconSettings):
        raise InputError(f"settings must be a ReconSettings, got {type(settings).__name__}")
    if not np.isfinite(bias) or bias <= 0:
        raise InputError(f"bias must be a positive number, got {bias!r}; set [reconstruct] bias")
    if not np.isfinite(growth_rate) or growth_rate < 0:
        raise InputError(f"growth rate f must be a finite number >= 0, got {growth_rate!r}; "
                         "set [reconstruct] growth_rate")


def reconstruct_box(positions: np.ndarray, weights: np.ndarray | None, box_size: float, *,
                    los_axis: int | None, growth_rate: float, bias: float,
                    settings: ReconSettings, seed: int | np.random.Generator,
                    progress: bool = False, workers: int | None = None) -> ReconResult:
    """Reconstruct a periodic box catalogue (plane-parallel line of sight along an axis).

    Parameters
    ----------
    positions : ndarray, shape (N, 3)
        Redshift-space positions in [0, box_size), Mpc/h (wrapped if outside).
    weights : ndarray, shape (N,), optional
        Weights (default 1).
    box_size : float
        Side of the periodic cube, Mpc/h.
    los_axis : int or None
        Axis (0, 1, 2) along which the RSD were applied; None means a real-space box (no RSD
        term is solved for or removed, and ``growth_rate`` is recorded as 0).
    growth_rate, bias : float
        Linear growth rate f and bias b.
    settings : ReconSettings
        Smoothing, mesh size, scheme, convention, precision, random_ratio.
    seed : int or numpy.random.Generator
        Seed of the uniform randoms that are shifted into the "S" catalogue.
    progress : bool
        Show a progress bar.
    workers : int, optional
        FFT threads (default all cores).

    Returns
    -------
    ReconResult
        Shifted data and randoms wrapped into the box; ``iterations = 0``.

    Notes
    -----
    Padmanabhan et al. 2012 (data by -[psi + f (psi . z) z]; randoms by -psi or, with
    "keep-rsd", like the data). The displacement equation is solved exactly
    (:func:`box_displacement`).
    """
    _check_common(bias, growth_rate, settings)
    pos = _as_positions(positions, "box positions")
    if pos.shape[0] == 0:
        raise InputError("the box catalogue is empty: nothing to reconstruct")
    w = _as_weights(weights, pos.shape[0], "box weights")
    if los_axis is not None and los_axis not in (0, 1, 2):
        raise InputError(f"los_axis must be 0, 1, 2 or None, got {los_axis!r}")
    f = float(growth_rate) if los_axis is not None else 0.0
    geometry = box_geometry(float(box_size), settings)
    n, side, dt = geometry.n_mesh, geometry.box_size, settings.dtype
    pos = np.mod(pos, side)
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    seed_value = None if isinstance(seed, np.random.Generator) else int(seed)
    steps = ["paint", "solve", "shift data", "shift randoms"]
    with tqdm(total=len(steps), desc="reconstruct", disable=not show_bars(progress), leave=False) as bar:
        rho = mesh.paint(pos, side, n, w, settings.scheme, 0.0, dt)
        delta = mesh.density_contrast(rho, w.sum() / n ** 3)
        del rho
        delta_k = mesh.to_fourier(delta, workers)
        del delta
        delta_k *= _smoothing_kernel(n, side, settings.smoothing, dt)
        bar.update(1)
        theta_k = box_displacement(delta_k, side, bias=bias, beta=f / bias,
                                   los_axis=los_axis)
        del delta_k
        bar.update(1)
        n_rand = max(1, int(round(settings.random_ratio * pos.shape[0])))
        rand = rng.uniform(0.0, side, size=(n_rand, 3))
        psi_d, psi_r = _displacement_at(theta_k, geometry, [pos, rand], settings.scheme,
                                        workers)
        del theta_k
        shifted_d = np.mod(pos - psi_d - _rsd_term(psi_d, pos, f, los_axis), side)
        bar.update(1)
        shift_r = psi_r
        if settings.convention == "keep-rsd":
            shift_r = psi_r + _rsd_term(psi_r, rand, f, los_axis)
        shifted_r = np.mod(rand - shift_r, side)
        bar.update(1)
    return ReconResult(data_positions=shifted_d, data_weights=w, random_positions=shifted_r,
                       random_weights=np.ones(n_rand), data_displacement=psi_d,
                       convention=settings.convention, growth_rate=f, bias=float(bias),
                       smoothing=float(settings.smoothing), geometry=geometry,
                       los_axis=los_axis, iterations=0, residual=0.0, residual_history=(),
                       random_seed=seed_value)


def reconstruct_survey(data_positions: np.ndarray, data_weights: np.ndarray | None,
                       random_positions: np.ndarray | None,
                       random_weights: np.ndarray | None, *, growth_rate: float, bias: float,
                       settings: ReconSettings, progress: bool = False,
                       workers: int | None = None) -> ReconResult:
    """Reconstruct a survey catalogue (observer at the origin, radial line of sight).

    Parameters
    ----------
    data_positions : ndarray, shape (N_data, 3)
        Comoving redshift-space positions of the galaxies, Mpc/h.
    data_weights : ndarray, shape (N_data,), optional
        Galaxy weights (e.g. FKP times completeness), default 1.
    random_positions : ndarray, shape (N_randoms, 3)
        Randoms of the same footprint and n(z), Mpc/h.
    random_weights : ndarray, shape (N_randoms,), optional
        Random weights, default 1.
    growth_rate, bias : float
        Linear growth rate f and bias b.
    settings : ReconSettings
        Mesh (n_mesh or cell_size, padding, box_size), smoothing, scheme, solver
        (max_iterations, tolerance), density_threshold, precision, convention.
    progress : bool
        Show progress bars.
    workers : int, optional
        FFT threads (default all cores).

    Returns
    -------
    ReconResult
        Galaxies shifted by -[psi + f (psi . r_hat) r_hat]; randoms by -psi ("remove-rsd")
        or by the same as the galaxies ("keep-rsd").

    Raises
    ------
    InputError
        No randoms, bad arrays, a mesh that cannot enclose the survey, or a cell larger than
        the smoothing radius.

    Notes
    -----
    Padmanabhan et al. 2012, MNRAS 427, 2132; iterative solution after Burden, Percival &
    Howlett 2015 (see :func:`survey_displacement`).
    """
    _check_common(bias, growth_rate, settings)
    if random_positions is None or np.size(random_positions) == 0:
        raise InputError("survey reconstruction needs randoms to define the footprint and the "
                         "mean density, but none were given; run the randoms stage first or "
                         "pass random_positions")
    d_pos = _as_positions(data_positions, "data positions")
    r_pos = _as_positions(random_positions, "random positions")
    if d_pos.shape[0] == 0:
        raise InputError("the data catalogue is empty: nothing to reconstruct")
    d_w = _as_weights(data_weights, d_pos.shape[0], "data weights")
    r_w = _as_weights(random_weights, r_pos.shape[0], "random weights")
    f = float(growth_rate)
    geometry = survey_geometry(d_pos, r_pos, settings)
    dt = settings.dtype
    with tqdm(total=4, desc="reconstruct", disable=not show_bars(progress), leave=False) as bar:
        delta = survey_density_contrast(d_pos, d_w, r_pos, r_w, geometry,
                                        smoothing=settings.smoothing, scheme=settings.scheme,
                                        density_threshold=settings.density_threshold, dtype=dt,
                                        workers=workers)
        delta_k = mesh.to_fourier(delta, workers)
        del delta
        bar.update(1)
        theta_k, iterations, history = survey_displacement(
            delta_k, geometry, bias=bias, beta=f / bias, max_iterations=settings.max_iterations,
            tolerance=settings.tolerance, workers=workers, progress=progress)
        del delta_k
        if history[-1] >= settings.tolerance:
            log.warning("reconstruction solver stopped after %d iterations at relative residual "
                        "%.3g (tolerance %.3g); raise [reconstruct] max_iterations",
                        iterations, history[-1], settings.tolerance)
        bar.update(1)
        psi_d, psi_r = _displacement_at(theta_k, geometry, [d_pos, r_pos], settings.scheme,
                                        workers)
        del theta_k
        shifted_d = d_pos - psi_d - _rsd_term(psi_d, d_pos, f, None)
        bar.update(1)
        if settings.convention == "keep-rsd":
            psi_r += _rsd_term(psi_r, r_pos, f, None)
        shifted_r = r_pos - psi_r
        bar.update(1)
    return ReconResult(data_positions=shifted_d, data_weights=d_w, random_positions=shifted_r,
                       random_weights=r_w, data_displacement=psi_d,
                       convention=settings.convention, growth_rate=f, bias=float(bias),
                       smoothing=float(settings.smoothing), geometry=geometry, los_axis=None,
                       iterations=iterations, residual=float(history[-1]),
                       residual_history=tuple(float(h) for h in history))
