"""Read multipoles and their covariance from an external file, for fit-only runs.

Two simple formats:

HDF5 (``.h5``, ``.hdf5``)
    datasets ``s`` (n_s,) in Mpc/h; ``xi0``, ``xi2`` and optionally ``xi4`` (n_s,);
    ``covariance`` (n_ell n_s, n_ell n_s) in the block order xi0, xi2[, xi4]. Optional
    attributes: ``z_eff`` (float), ``covariance_type`` (str), ``n_mocks`` (int),
    ``variance_factor`` (Percival et al. 2014 m1), ``precision_factor`` (Hartlap factor).

Text
    the multipoles file has columns ``s xi0 xi2 [xi4]`` (``#`` comments; a header line
    ``# z_eff = 0.51`` is read); the covariance is a separate whitespace-separated square
    matrix, by default next to it with the suffix ``.cov`` (``multipoles.txt`` ->
    ``multipoles.cov``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from corrpipe.errors import InputError

__all__ = ["ExternalMultipoles", "load_external_multipoles"]


@dataclass(frozen=True)
class ExternalMultipoles:
    """Multipoles and covariance read from a file (the arguments of ``fit_multipoles``)."""

    s: np.ndarray
    ells: tuple
    data_vector: np.ndarray
    covariance: np.ndarray
    z_eff: float | None = None
    meta: dict = field(default_factory=dict)


def load_external_multipoles(path: str | Path,
                             covariance_path: str | Path | None = None) -> ExternalMultipoles:
    """Read multipoles plus covariance (see the module docstring for the formats).

    Parameters
    ----------
    path : str or Path
        HDF5 file, or text file of multipoles.
    covariance_path : str or Path, optional
        Text covariance matrix (text format only; default: ``path`` with suffix ``.cov``).

    Raises
    ------
    InputError
        Missing files or datasets, inconsistent shapes, non-finite values.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"multipoles file {path} does not exist")
    if path.suffix.lower() in (".h5", ".hdf5"):
        return _read_hdf5(path)
    return _read_text(path, covariance_path)


def _read_hdf5(path: Path) -> ExternalMultipoles:
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise InputError(f"multipoles file {path} is not a readable HDF5 file: {exc}") from exc
    with f:
        for need in ("s", "xi0", "covariance"):
            if need not in f:
                raise InputError(f"multipoles file {path} has no dataset '{need}'; expected "
                                 f"datasets s, xi0, xi2[, xi4], covariance (found "
                                 f"{sorted(f.keys())})")
        s = np.asarray(f["s"][()], dtype=float)
        ells = tuple(e for e in (0, 2, 4) if f"xi{e}" in f)
        blocks = [np.asarray(f[f"xi{e}"][()], dtype=float) for e in ells]
        cov = np.asarray(f["covariance"][()], dtype=float)
        meta = {k: (v.item() if hasattr(v, "item") else v) for k, v in f.attrs.items()}
    z = meta.pop("z_eff", None)
    return _assemble(path, s, ells, blocks, cov, None if z is None else float(z), meta)


def _read_text(path: Path, covariance_path) -> ExternalMultipoles:
    cov_path = Path(covariance_path) if covariance_path is not None else path.with_suffix(".cov")
    if not cov_path.is_file():
        raise InputError(f"covariance file {cov_path} for {path} does not exist; give it "
                         "explicitly or put a square matrix next to the multipoles with the "
                         "suffix .cov")
    try:
        table = np.loadtxt(path, comments="#", ndmin=2)
        cov = np.loadtxt(cov_path, comments="#", ndmin=2)
    except ValueError as exc:
        raise InputError(f"cannot read {path} or {cov_path} as numeric text: {exc}") from exc
    if table.shape[1] not in (2, 3, 4):
        raise InputError(f"multipoles file {path} has {table.shape[1]} columns; expected "
                         "s xi0 xi2 [xi4]")
    z = None
    with open(path) as fh:
        for line in fh:
            m = re.match(r"#\s*z_eff\s*=\s*([0-9.eE+-]+)", line)
            if m:
                z = float(m.group(1))
    ells = (0, 2, 4)[: table.shape[1] - 1]
    return _assemble(path, table[:, 0], ells, [table[:, i + 1] for i in range(len(ells))],
                     cov, z, {"covariance_file": str(cov_path)})


def _assemble(path: Path, s, ells, blocks, cov, z, meta) -> ExternalMultipoles:
    n = s.size
    for e, b in zip(ells, blocks):
        if b.shape != (n,):
            raise InputError(f"{path}: xi{e} has {b.size} values but s has {n}")
    d = np.concatenate(blocks)
    if cov.shape != (d.size, d.size):
        raise InputError(f"{path}: the covariance is {cov.shape[0]} x {cov.shape[1]}, expected "
                         f"{d.size} x {d.size} ({len(ells)} multipoles x {n} bins, block "
                         "order xi0, xi2[, xi4])")
    if not (np.all(np.isfinite(s)) and np.all(np.isfinite(d)) and np.all(np.isfinite(cov))):
        raise InputError(f"{path}: separations, multipoles or covariance contain NaN or inf")
    if np.any(np.diff(s) <= 0):
        raise InputError(f"{path}: separations s must increase strictly")
    return ExternalMultipoles(s=s, ells=tuple(ells), data_vector=d, covariance=cov, z_eff=z,
                              meta=meta)
