"""Carve a sky survey out of a box mock, draw matching randoms, write catalogue files.

The box's comoving positions (Mpc/h of the *true* cosmology the mock was made in) are placed
around an observer, shifted by the radial redshift-space distortion f (psi . r) r, turned
into (RA, Dec, z) with the true cosmology's chi -> z, cut to a footprint and a redshift shell,
and thinned to a target n(z). An analysis in a different fiducial cosmology then sees the
dilation given by :func:`corrpipe.mocks.dilation.expected_dilation`.
"""

from __future__ import annotations

import os
import tempfile
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np

from corrpipe.cosmology import cartesian_to_sky
from corrpipe.errors import InputError
from corrpipe.mocks.box import BoxMock

__all__ = [
    "SurveyMock",
    "carve_survey",
    "tabulated_nz",
    "survey_randoms",
    "shell_volume_fraction_outside",
    "write_sky_catalogue",
    "write_box_catalogue",
]


@dataclass(frozen=True)
class SurveyMock:
    """A mock sky catalogue.

    Attributes
    ----------
    ra, dec : ndarray of float64, shape (N,)
        Directions, degrees.
    z : ndarray of float64, shape (N,)
        Observed redshift (with the radial RSD when it was applied).
    z_cosmo : ndarray of float64, shape (N,)
        Cosmological redshift of the real-space position.
    weights : ndarray of float64, shape (N,)
        Object weights (1).
    meta : dict
        Provenance: box kind, seed, growth rate, observer, redshift shell, footprint area.
    """

    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    z_cosmo: np.ndarray
    weights: np.ndarray
    meta: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.ra.size)


def tabulated_nz(z_nodes, density) -> Callable:
    """Piecewise-linear n(z) from a table, zero outside it.

    Parameters
    ----------
    z_nodes : array_like, shape (m,)
        Increasing redshifts.
    density : array_like, shape (m,)
        Comoving number density at the nodes, (h/Mpc)^3, >= 0.
    """
    z = np.asarray(z_nodes, dtype=float)
    n = np.asarray(density, dtype=float)
    if z.ndim != 1 or z.shape != n.shape or z.size < 2:
        raise InputError(f"n(z) table needs two equal-length lists with >= 2 entries; got "
                         f"{z.shape} redshifts and {n.shape} densities")
    if np.any(np.diff(z) <= 0):
        raise InputError("n(z) table redshifts must increase strictly")
    if np.any(~np.isfinite(n)) or np.any(n < 0):
        raise InputError("n(z) table densities must be finite and >= 0 (h/Mpc)^3")

    def nz(zz):
        return np.interp(np.asarray(zz, dtype=float), z, n, left=0.0, right=0.0)

    return nz


def _shell_radii(cosmology, z_min: float, z_max: float) -> tuple[float, float]:
    if not (0 <= z_min < z_max) or not np.isfinite(z_max):
        raise InputError(f"survey redshift shell needs 0 <= z_min < z_max; got z_min = "
                         f"{z_min}, z_max = {z_max}")
    return float(cosmology.comoving_distance(z_min)), float(cosmology.comoving_distance(z_max))


def _cone_points(footprint, r_min, r_max, n, rng):
    ra, dec = footprint.sample(n, rng)
    u = rng.random(n)
    r = np.cbrt(r_min**3 + u * (r_max**3 - r_min**3))
    ra_r, dec_r = np.radians(ra), np.radians(dec)
    return np.stack([r * np.cos(dec_r) * np.cos(ra_r), r * np.cos(dec_r) * np.sin(ra_r),
                     r * np.sin(dec_r)], axis=1)


def shell_volume_fraction_outside(footprint, cosmology, z_min: float, z_max: float,
                                  box_size: float, observer, n_probe: int = 20000,
                                  seed: int = 0) -> float:
    """Fraction of the survey volume (footprint x shell) that falls outside the box.

    Parameters
    ----------
    observer : array_like, shape (3,)
        Observer position inside the box frame, Mpc/h.
    n_probe : int
        Number of Monte Carlo points.
    """
    r_min, r_max = _shell_radii(cosmology, z_min, z_max)
    pts = _cone_points(footprint, r_min, r_max, n_probe, np.random.default_rng(seed))
    pts += np.asarray(observer, dtype=float)
    out = np.any((pts < 0) | (pts >= box_size), axis=1)
    return float(out.mean())


def carve_survey(
    box: BoxMock,
    cosmology,
    footprint,
    z_min: float,
    z_max: float,
    *,
    observer=(0.0, 0.0, 0.0),
    nz: Callable | None = None,
    rsd: bool = True,
    replicate: bool = False,
    seed=0,
) -> SurveyMock:
    """Cut a sky survey out of a periodic box mock.

    Parameters
    ----------
    box : BoxMock
        Box mock made in ``cosmology`` (no injected box stretch).
    cosmology : corrpipe.cosmology.Cosmology
        The *true* cosmology: positions in its Mpc/h, its chi -> z.
    footprint : corrpipe.survey.footprint.Footprint
        Angular mask (``contains(ra, dec)``, ``sample(n, rng)``).
    z_min, z_max : float
        Redshift shell (observed redshift).
    observer : array_like, shape (3,)
        Observer position in the box frame, Mpc/h.
    nz : callable, optional
        Target comoving density n(z) in (h/Mpc)^3 of the true cosmology; objects are kept with
        probability n(z) / nbar of the box. None keeps them all (constant n = nbar).
    rsd : bool
        Apply the radial redshift-space shift s = x + f (psi . r_hat) r_hat.
    replicate : bool
        Tile the periodic box when the survey reaches beyond it (repeats structure on the box
        scale). Without it, a survey volume that leaves the box is an error.
    seed : int or numpy.random.Generator
        Randomness for the n(z) thinning.

    Returns
    -------
    SurveyMock

    Raises
    ------
    InputError
        Stretched box, footprint/shell outside the box, or n(z) above the box density.

    Notes
    -----
    Linear radial RSD (Kaiser 1987 in the radial form of Hamilton 1992, REFERENCES sec. 3): the
    line-of-sight velocity a H f psi . r_hat moves an object by f psi . r_hat in distance.
    """
    if box.alpha_par != 1.0 or box.alpha_perp != 1.0:
        raise InputError("carve_survey needs a box without an injected stretch (alpha_par = "
                         "alpha_perp = 1); for a survey, inject the dilation through the true "
                         "cosmology instead")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(int(seed))
    observer = np.asarray(observer, dtype=float).reshape(3)
    L = float(box.box_size)
    r_min, r_max = _shell_radii(cosmology, z_min, z_max)
    if not replicate:
        outside = shell_volume_fraction_outside(footprint, cosmology, z_min, z_max, L, observer)
        if outside > 0:
            raise InputError(
                f"survey footprint outside the box: {100 * outside:.1f}% of the survey volume "
                f"(footprint x {z_min} < z < {z_max}, radii {r_min:.0f}-{r_max:.0f} Mpc/h) lies "
                f"outside the {L:g} Mpc/h box seen from the observer at {observer.tolist()}; "
                "move the observer, shrink the footprint or redshift range, enlarge the box, "
                "or set replicate = true")
    margin = 3.0 * float(np.max(np.abs(box.displacement))) * max(box.growth_rate, 0.0) + 1.0
    lo = np.floor((observer - r_max - margin) / L).astype(int)
    hi = np.floor((observer + r_max + margin) / L).astype(int)
    shifts = [np.array([i, j, k]) * L for i in range(lo[0], hi[0] + 1)
              for j in range(lo[1], hi[1] + 1) for k in range(lo[2], hi[2] + 1)]
    if not replicate:
        shifts = [np.zeros(3)]
    pieces = []
    for shift in shifts:
        x = box.positions + (shift - observer)
        r = np.sqrt(np.einsum("ij,ij->i", x, x))
        sel = (r > max(r_min - margin, 0.0)) & (r < r_max + margin)
        if not sel.any():
            continue
        x, r, psi = x[sel], r[sel], box.displacement[sel]
        if rsd and box.growth_rate > 0:
            radial = np.einsum("ij,ij->i", psi, x) / np.where(r > 0, r, 1.0)
            s = x * ((r + box.growth_rate * radial) / np.where(r > 0, r, 1.0))[:, None]
        else:
            s = x
        ra, dec, z_obs = cartesian_to_sky(s, cosmology)
        z_cos = cosmology.redshift_at(r)
        keep = (z_obs >= z_min) & (z_obs < z_max) & footprint.contains(ra, dec)
        pieces.append((ra[keep], dec[keep], z_obs[keep], z_cos[keep]))
    if pieces:
        ra, dec, z_obs, z_cos = (np.concatenate(p) for p in zip(*pieces))
    else:
        ra = dec = z_obs = z_cos = np.empty(0)
    if nz is not None:
        z_grid = np.linspace(z_min, z_max, 512)
        n_grid = np.asarray(nz(z_grid), dtype=float)
        if np.any(~np.isfinite(n_grid)) or np.any(n_grid < 0):
            raise InputError("the target n(z) returned negative or non-finite densities in "
                             f"{z_min} <= z < {z_max}")
        peak = float(n_grid.max())
        if peak > box.nbar * (1 + 1e-9):
            raise InputError(f"target n(z) peaks at {peak:.3g} (h/Mpc)^3, above the box mock's "
                             f"density nbar = {box.nbar:.3g}; thinning cannot add objects, so "
                             f"make the box with nbar >= {peak:.3g}")
        keep = rng.random(ra.size) < np.asarray(nz(z_obs), dtype=float) / box.nbar
        ra, dec, z_obs, z_cos = ra[keep], dec[keep], z_obs[keep], z_cos[keep]
    meta = {"box_kind": box.kind, "box_seed": box.seed, "box_size": L, "bias": box.bias,
            "growth_rate": box.growth_rate, "observer": observer.tolist(), "z_min": z_min,
            "z_max": z_max, "rsd": bool(rsd), "replicate": bool(replicate),
            "area_deg2": float(footprint.area_deg2())}
    return SurveyMock(ra=ra, dec=dec, z=z_obs, z_cosmo=z_cos, weights=np.ones(ra.size),
                      meta=meta)


def survey_randoms(footprint, cosmology, z_min: float, z_max: float, n_randoms: int, *,
                   nz: Callable | None = None, seed=0) -> tuple[np.ndarray, np.ndarray,
                                                             np.ndarray]:
    """Random points uniform in the footprint with redshifts following n(z) dV/dz.

    Parameters
    ----------
    footprint : corrpipe.survey.footprint.Footprint
        Angular mask.
    cosmology : corrpipe.cosmology.Cosmology
        Cosmology of the n(z) (the mock's true one).
    z_min, z_max : float
        Redshift shell.
    n_randoms : int
        Number of points.
    nz : callable, optional
        n(z) in (h/Mpc)^3; None for a constant density.
    seed : int or numpy.random.Generator

    Returns
    -------
    ra, dec, z : ndarray of float64, shape (n_randoms,)

    Notes
    -----
    dV/dz dOmega = chi^2 D_H for a flat universe (D_M^2 D_H / sqrt(1 + Omega_k (D_M/D_H0)^2)
    in general, Hogg 1999, astro-ph/9905116, eq. 28 [from memory]); here chi^2 -> D_M^2 and
    the curvature factor is taken from the cosmology's transverse distance.
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(int(seed))
    n_randoms = int(n_randoms)
    if n_randoms <= 0:
        raise InputError(f"number of randoms must be positive, got {n_randoms}")
    _shell_radii(cosmology, z_min, z_max)
    z_grid = np.linspace(z_min, z_max, 4097)
    chi = np.asarray(cosmology.comoving_distance(z_grid))
    dchi_dz = np.gradient(chi, z_grid)
    d_m = np.asarray(cosmology.transverse_distance(z_grid))
    dens = d_m**2 * dchi_dz
    if nz is not None:
        dens = dens * np.asarray(nz(z_grid), dtype=float)
    if not np.any(dens > 0):
        raise InputError(f"the n(z) is zero everywhere in {z_min} <= z < {z_max}; no randoms "
                         "can be drawn")
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (dens[1:] + dens[:-1]) * np.diff(z_grid))])
    cdf /= cdf[-1]
    z = np.interp(rng.random(n_randoms), cdf, z_grid)
    ra, dec = footprint.sample(n_randoms, rng)
    return np.asarray(ra, float), np.asarray(dec, float), z


def _atomic_table_write(table, path: Path, overwrite: bool) -> Path:
    path = Path(path)
    suffix = "".join(path.suffixes[-2:]) if path.name.endswith(".gz") else path.suffix
    fmt = {".fits": "fits", ".fit": "fits", ".fits.gz": "fits", ".h5": "hdf5",
           ".hdf5": "hdf5", ".ecsv": "ascii.ecsv", ".csv": "ascii.csv"}.get(suffix.lower())
    if fmt is None:
        raise InputError(f"cannot write {path}: unknown file type {suffix!r}; use .fits, .h5, "
                         ".hdf5, .ecsv or .csv")
    if path.exists() and not overwrite:
        raise InputError(f"{path} exists; remove it or pass overwrite=True")
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=path.name + ".", suffix=".part" + suffix,
                               dir=path.parent)
    os.close(fd)
    try:
        os.unlink(tmp)
        kwargs = {"path": "catalogue", "serialize_meta": True} if fmt == "hdf5" else {}
        with warnings.catch_warnings():
            # long metadata keys become FITS HIERARCH cards; that is fine and expected
            warnings.simplefilter("ignore", category=UserWarning)
            table.write(tmp, format=fmt, **kwargs)
        os.replace(tmp, path)
    except Exception as exc:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise InputError(f"writing {path} failed: {exc}") from exc
    return path


def _table_meta(meta: dict | None) -> dict:
    out = {}
    for key, value in (meta or {}).items():
        if isinstance(value, (bool, int, float, str, np.integer, np.floating)):
            out[str(key).upper()] = value.item() if hasattr(value, "item") else value
        elif isinstance(value, (list, tuple)):
            out[str(key).upper()] = ",".join(str(v) for v in value)
    return out


def write_sky_catalogue(path, ra, dec, z, weights=None, *, meta: dict | None = None,
                        overwrite: bool = False, extra: dict | None = None) -> Path:
    """Write a sky catalogue with columns RA, DEC, Z, WEIGHT (degrees, degrees, -, -).

    Parameters
    ----------
    path : str or Path
        ``.fits``, ``.h5``/``.hdf5``, ``.ecsv`` or ``.csv``. Written to a temporary file in the
        same folder and moved into place when complete.
    extra : dict, optional
        More columns (name -> array of the same length).
    meta : dict, optional
        Scalar metadata stored in the header / attributes (keys upper-cased).
    """
    from astropy.table import Table

    ra = np.asarray(ra, dtype=np.float64)
    cols = {"RA": ra, "DEC": np.asarray(dec, dtype=np.float64),
            "Z": np.asarray(z, dtype=np.float64),
            "WEIGHT": np.ones_like(ra) if weights is None else np.asarray(weights, np.float64)}
    for name, values in (extra or {}).items():
        cols[name] = np.asarray(values)
    lengths = {k: v.shape for k, v in cols.items()}
    if len({v.shape for v in cols.values()}) != 1:
        raise InputError(f"catalogue columns differ in length: {lengths}")
    return _atomic_table_write(Table(cols, meta=_table_meta(meta)), path, overwrite)


def write_box_catalogue(path, positions, *, meta: dict | None = None,
                        overwrite: bool = False) -> Path:
    """Write box positions as columns x, y, z (Mpc/h) plus WEIGHT; see :func:`write_sky_catalogue`."""
    from astropy.table import Table

    pos = np.asarray(positions, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"box positions must have shape (N, 3); got {pos.shape}")
    table = Table({"x": pos[:, 0], "y": pos[:, 1], "z": pos[:, 2],
                   "WEIGHT": np.ones(pos.shape[0])}, meta=_table_meta(meta))
    return _atomic_table_write(table, path, overwrite)
