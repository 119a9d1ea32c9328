"""Reconstruction settings (the ``[reconstruct]`` table), mesh geometry, the result type and
the growth-rate and memory helpers."""

from __future__ import annotations

import logging
from dataclasses import dataclass, field

import numpy as np

from corrpipe.errors import CheckpointError, ConfigError, InputError
from corrpipe.settings import setting

__all__ = [
    "CONVENTIONS",
    "ReconSettings",
    "MeshGeometry",
    "ReconResult",
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
