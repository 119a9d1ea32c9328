"""BAO reconstruction: estimate the linear displacement from the galaxy field and undo it.

The galaxy overdensity is painted on a mesh, smoothed with a Gaussian, and the Zel'dovich
displacement psi is solved from

    div psi + beta div[(psi . r_hat) r_hat] = -delta / b,        beta = f / b,

(Padmanabhan et al. 2012). In a periodic box with a fixed line of sight the equation is
diagonal in Fourier space and is solved exactly; for a survey (observer at the origin, radial
line of sight) it is solved iteratively in Fourier space, treating the radial term with the
previous iterate (the scheme of Burden, Percival & Howlett 2015 [from memory]), with the over-relaxation
described in :func:`survey_displacement`. Data are then moved by ``-[psi + f (psi . r) r]``
and randoms by ``-psi`` ("remove-rsd") or ``-[psi + f (psi . r) r]`` ("keep-rsd"); the
estimator is (DD - 2DS + SS)/RR with the unshifted randoms for RR.

Units: positions, lengths and displacements in Mpc/h; the observer of a survey sits at the
origin. Meshes are float64 or float32 (``precision``); a 512^3 float64 mesh takes 1 GiB.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass, field

import numpy as np
import scipy.fft
from tqdm.auto import tqdm

from corrpipe import mesh
from corrpipe.errors import CheckpointError, ConfigError, InputError, StageError
from corrpipe.recon_kernels import read_vector_kernel
from corrpipe.settings import setting

__all__ = [
    "CONVENTIONS",
    "ReconSettings",
    "MeshGeometry",
    "ReconResult",
    "survey_geometry",
    "box_geometry",
    "survey_density_contrast",
    "box_displacement",
    "survey_displacement",
    "equation_residual",
    "reconstruct_box",
    "reconstruct_survey",
    "resolve_growth_rate",
    "memory_estimate",
]

log = logging.getLogger(__name__)

#: Conventions for the randoms' redshift-space term: "remove-rsd" shifts randoms by -psi only
#: (the linear RSD are removed from the reconstructed field); "keep-rsd" shifts them by the
#: same -[psi + f (psi . r) r] as the data (the linear RSD stay in the field).
CONVENTIONS = ("remove-rsd", "keep-rsd")

_DEFAULT_N_MESH = 256
_SCHEMA = 1


@dataclass(frozen=True)
class ReconSettings:
    """Config table ``[reconstruct]``: BAO reconstruction of the density field."""

    enabled: bool = setting(False, "run the reconstruct stage between randoms and counts")
    convention: str = setting("remove-rsd", "redshift-space term of the shifted randoms: "
                              "remove-rsd (randoms by -psi) or keep-rsd (randoms like the data)",
                              choices=CONVENTIONS)
    smoothing: float = setting(15.0, "Gaussian smoothing radius of the density field",
                               unit="Mpc/h", low=0.0, low_open=True, high=200.0)
    bias: float = setting(2.0, "linear bias b of the tracer", low=0.1, high=20.0)
    growth_rate: float | None = setting(None, "linear growth rate f (empty: the fiducial "
                                        "cosmology's f at the effective redshift)",
                                        low=0.0, high=3.0)
    n_mesh: int | None = setting(None, "mesh nodes per side (empty: from cell_size; 256 when "
                                 "both are empty)", low=16, high=4096)
    cell_size: float | None = setting(None, "mesh cell side (give n_mesh or cell_size, not "
                                      "both)", unit="Mpc/h", low=0.0, low_open=True,
                                      high=500.0)
    box_size: float | None = setting(None, "side of a survey's mesh cube (empty: the survey "
                                     "extent plus twice the padding)", unit="Mpc/h", low=0.0,
                                     low_open=True)
    padding: float = setting(100.0, "empty margin added on each side of a survey's extent",
                             unit="Mpc/h", low=0.0, high=5000.0)
    scheme: str = setting("cic", "mass assignment and read-out kernel",
                          choices=("ngp", "cic", "tsc"))
    max_iterations: int = setting(10, "most iterations of the survey solver", low=1, high=200)
    tolerance: float = setting(1e-3, "stop the survey solver when the relative residual of the "
                               "displacement equation is below this", low=0.0, low_open=True,
                               high=1.0)
    density_threshold: float = setting(0.01, "cells whose smoothed random density is below "
                                       "this fraction of its typical value get delta = 0",
                                       low=0.0, high=1.0)
    precision: str = setting("double", "floating-point type of the meshes (single halves "
                             "the memory)", choices=("double", "single"))
    random_ratio: float = setting(2.0, "periodic box: number of shifted randoms per data "
                                  "object", low=0.0, low_open=True, high=1000.0)

    def validate(self) -> None:
        """Cross-field checks of the table."""
        if self.n_mesh is not None and self.cell_size is not None:
            raise ConfigError(f"give n_mesh or cell_size, not both (got n_mesh = {self.n_mesh}, "
                              f"cell_size = {self.cell_size}); remove one of the two keys")
        if self.cell_size is not None and self.smoothing < self.cell_size:
            raise ConfigError(f"smoothing = {self.smoothing} Mpc/h is below cell_size = "
                              f"{self.cell_size} Mpc/h; the mesh cannot resolve the smoothing "
                              "kernel: lower cell_size or raise smoothing")
        if self.box_size is not None and self.cell_size is not None \
                and self.cell_size > self.box_size / 16:
            raise ConfigError(f"cell_size = {self.cell_size} Mpc/h gives fewer than 16 cells "
                              f"across box_size = {self.box_size} Mpc/h; lower cell_size")

    @property
    def dtype(self) -> type:
        """numpy real dtype of the meshes."""
        return np.float32 if self.precision == "single" else np.float64


@dataclass(frozen=True)
class MeshGeometry:
    """Placement of the reconstruction mesh.

    Attributes
    ----------
    origin : tuple of 3 floats
        Position of mesh node (0, 0, 0), Mpc/h.
    box_size : float
        Side of the mesh cube, Mpc/h.
    n_mesh : int
        Nodes per side.
    periodic : bool
        True for a periodic simulation box (the mesh is the box).
    """

    origin: tuple
    box_size: float
    n_mesh: int
    periodic: bool

    @property
    def cell_size(self) -> float:
        """Side of one cell, Mpc/h."""
        return self.box_size / self.n_mesh

    def node_coordinates(self, dtype: type = np.float64) -> tuple:
        """Node coordinates per axis, shapes (n,1,1), (1,n,1), (1,1,n), Mpc/h."""
        n = self.n_mesh
        line = np.arange(n, dtype=np.float64) * self.cell_size
        out = []
        for a in range(3):
            shape = [1, 1, 1]
            shape[a] = n
            out.append((self.origin[a] + line).astype(dtype).reshape(shape))
        return tuple(out)


@dataclass(frozen=True)
class ReconResult:
    """Shifted catalogues and diagnostics of one reconstruction.

    Attributes
    ----------
    data_positions : ndarray of float64, shape (N_data, 3)
        Shifted data ("D" of the estimator), Mpc/h; wrapped into [0, L) for a box.
    data_weights : ndarray of float64, shape (N_data,)
        Weights of the data (unchanged by the shift).
    random_positions : ndarray of float64, shape (N_randoms, 3)
        Shifted randoms ("S"), Mpc/h.
    random_weights : ndarray of float64, shape (N_randoms,)
        Weights of the shifted randoms.
    data_displacement : ndarray of float64, shape (N_data, 3)
        Real-space displacement psi read at the (unshifted) data, Mpc/h.
    convention : str
        ``"remove-rsd"`` or ``"keep-rsd"``.
    growth_rate, bias, smoothing : float
        f, b and the Gaussian radius (Mpc/h) used.
    geometry : MeshGeometry
        The mesh (origin, side, nodes).
    los_axis : int or None
        Fixed line-of-sight axis of a box; None for a survey (radial) or a real-space box.
    iterations : int
        Solver iterations (0 for the exact box solver).
    residual : float
        Relative residual of the displacement equation at the returned solution.
    residual_history : tuple of float
        Residual before each iteration (survey), for convergence reports.
    random_seed : int or None
        Seed of a box's uniform randoms.
    """

    data_positions: np.ndarray
    data_weights: np.ndarray
    random_positions: np.ndarray
    random_weights: np.ndarray
    data_displacement: np.ndarray
    convention: str
    growth_rate: float
    bias: float
    smoothing: float
    geometry: MeshGeometry
    los_axis: int | None
    iterations: int
    residual: float
    residual_history: tuple = field(default_factory=tuple)
    random_seed: int | None = None

    _ARRAYS = ("data_positions", "data_weights", "random_positions", "random_weights",
               "data_displacement")

    def to_hdf5(self, group) -> None:
        """Write the result into an open h5py group (datasets plus attributes)."""
        for name in self._ARRAYS:
            group.create_dataset(name, data=np.asarray(getattr(self, name)))
        a = group.attrs
        a["schema"] = _SCHEMA
        a["convention"] = self.convention
        a["growth_rate"] = float(self.growth_rate)
        a["bias"] = float(self.bias)
        a["smoothing"] = float(self.smoothing)
        a["origin"] = np.asarray(self.geometry.origin, dtype=np.float64)
        a["box_size"] = float(self.geometry.box_size)
        a["n_mesh"] = int(self.geometry.n_mesh)
        a["periodic"] = bool(self.geometry.periodic)
        a["los_axis"] = -1 if self.los_axis is None else int(self.los_axis)
        a["iterations"] = int(self.iterations)
        a["residual"] = float(self.residual)
        a["residual_history"] = np.asarray(self.residual_history, dtype=np.float64)
        a["random_seed"] = -1 if self.random_seed is None else int(self.random_seed)

    @classmethod
    def from_hdf5(cls, group) -> "ReconResult":
        """Read a result written by :meth:`to_hdf5`."""
        where = getattr(group, "name", "<group>")
        missing = [n for n in cls._ARRAYS if n not in group]
        need = ("schema", "convention", "growth_rate", "bias", "smoothing", "origin", "box_size",
                "n_mesh", "periodic", "los_axis", "iterations", "residual")
        missing += [f"@{n}" for n in need if n not in group.attrs]
        if missing:
            raise CheckpointError(f"reconstruction group {where} lacks {', '.join(missing)}; "
                                  "the file is damaged or from another program: rerun the "
                                  "reconstruct stage (--force)")
        a = group.attrs
        if int(a["schema"]) != _SCHEMA:
            raise CheckpointError(f"reconstruction group {where} has schema {int(a['schema'])}, "
                                  f"this version reads schema {_SCHEMA}; rerun the stage")
        arrays = {n: np.asarray(group[n][...]) for n in cls._ARRAYS}
        los = int(a["los_axis"])
        seed = int(a.get("random_seed", -1))
        geometry = MeshGeometry(origin=tuple(float(v) for v in a["origin"]),
                                box_size=float(a["box_size"]), n_mesh=int(a["n_mesh"]),
                                periodic=bool(a["periodic"]))
        return cls(**arrays, convention=str(a["convention"]),
                   growth_rate=float(a["growth_rate"]), bias=float(a["bias"]),
                   smoothing=float(a["smoothing"]), geometry=geometry,
                   los_axis=None if los < 0 else los, iterations=int(a["iterations"]),
                   residual=float(a["residual"]),
                   residual_history=tuple(float(v) for v in
                                          np.atleast_1d(a.get("residual_history", []))),
                   random_seed=None if seed < 0 else seed)


# ----------------------------------------------------------------------------- settings glue


def resolve_growth_rate(settings: ReconSettings, cosmology, z_eff: float) -> float:
    """Growth rate f to use: the configured value, else the cosmology's f(z_eff).

    Parameters
    ----------
    settings : ReconSettings
    cosmology : corrpipe.cosmology.Cosmology
        Fiducial cosmology (its ``growth_rate(z)``).
    z_eff : float
        Effective redshift of the sample (e.g. the weighted mean redshift).
    """
    if settings.growth_rate is not None:
        return float(settings.growth_rate)
    if not np.isfinite(z_eff) or z_eff < 0:
        raise InputError(f"effective redshift must be a finite number >= 0 to compute the "
                         f"growth rate, got {z_eff!r}; or set [reconstruct] growth_rate")
    return float(np.asarray(cosmology.growth_rate(float(z_eff))))


def memory_estimate(n_mesh: int, precision: str = "double", survey: bool = True) -> int:
    """Peak bytes held by the reconstruction meshes (not counting the catalogues).

    The survey solver keeps up to 8 real-mesh-sized arrays alive at once (delta_k, the
    iterate, 1/r, the three components of psi, and two work arrays of the FFTs); the box
    solver keeps 5 (delta_k and psi, plus a work array). A half-space complex transform takes
    the bytes of a real mesh (n^2 (n/2+1) complex vs n^3 real).
    """
    itemsize = 4 if precision == "single" else 8
    n = int(n_mesh)
    per_mesh = n * n * (n // 2 + 1) * 2 * itemsize
    return per_mesh * (8 if survey else 5)


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
    with tqdm(total=max_iterations, desc="reconstruct: solve", disable=not progress,
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
    with tqdm(total=len(steps), desc="reconstruct", disable=not progress, leave=False) as bar:
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
    with tqdm(total=4, desc="reconstruct", disable=not progress, leave=False) as bar:
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
