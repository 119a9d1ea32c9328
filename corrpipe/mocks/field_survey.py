"""Survey mocks observed through a field footprint with a selection that varies per field.

:func:`select_in_fields` thins a carved mock (:func:`corrpipe.mocks.survey.carve_survey` with
the field footprint and no n(z)) so that each object survives with probability
completeness(field) x n_k(z) / nbar_box, n_k being the target density of its field's depth
class; :func:`field_selection_randoms` draws randoms with exactly that selection (the "true
selection" a measurement on such mocks can be compared with).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from corrpipe.errors import InputError
from corrpipe.mocks.survey import SurveyMock
from corrpipe.survey.fields import FieldFootprint

__all__ = ["field_selection_randoms", "select_in_fields"]


def _density_grid(nz_of_class: Callable, z_grid: np.ndarray, n_classes: int) -> np.ndarray:
    grid = np.array([np.asarray(nz_of_class(z_grid, np.full(z_grid.size, k)), dtype=float)
                     for k in range(n_classes)])
    if np.any(~np.isfinite(grid)) or np.any(grid < 0):
        raise InputError("the per-class target n(z) returned negative or non-finite values")
    return grid


def select_in_fields(mock: SurveyMock, footprint: FieldFootprint, nz_of_class: Callable,
                     box_nbar: float, *, seed=0) -> SurveyMock:
    """Thin a mock to a per-field completeness and a per-depth-class n(z).

    Parameters
    ----------
    mock : SurveyMock
        Mock carved with ``footprint`` and without n(z) thinning (density = the box's nbar).
    footprint : FieldFootprint
        Fields with completeness and depth classes.
    nz_of_class : callable
        ``nz_of_class(z, classes) -> density`` in (h/Mpc)^3 of the true cosmology.
    box_nbar : float
        Number density of the box the mock was carved from, (h/Mpc)^3.
    seed : int or numpy.random.Generator

    Returns
    -------
    SurveyMock
        The kept objects; ``meta`` gains ``selection = "fields"``.
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(int(seed))
    z_lo = float(mock.meta.get("z_min", np.min(mock.z, initial=0.0)))
    z_hi = float(mock.meta.get("z_max", np.max(mock.z, initial=1.0)))
    n_classes = int(footprint.depth_class.max()) + 1
    peak = float(_density_grid(nz_of_class, np.linspace(z_lo, z_hi, 512), n_classes).max())
    if peak > box_nbar * (1 + 1e-9):
        raise InputError(f"the per-class n(z) peaks at {peak:.3g} (h/Mpc)^3, above the box "
                         f"density {box_nbar:.3g}; thinning cannot add objects")
    owner = footprint.owner(mock.ra, mock.dec)
    inside = owner >= 0
    field = np.maximum(owner, 0)
    prob = np.where(inside, footprint.completeness_values[field]
                    * np.asarray(nz_of_class(mock.z, footprint.depth_class[field]), float)
                    / box_nbar, 0.0)
    keep = rng.random(mock.ra.size) < prob
    meta = dict(mock.meta, selection="fields", n_fields=footprint.n_fields)
    return SurveyMock(ra=mock.ra[keep], dec=mock.dec[keep], z=mock.z[keep],
                      z_cosmo=mock.z_cosmo[keep], weights=mock.weights[keep], meta=meta)


def field_selection_randoms(footprint: FieldFootprint, cosmology, z_min: float, z_max: float,
                            n_randoms: int, nz_of_class: Callable, *, seed=0
                            ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Randoms with the true selection of :func:`select_in_fields`.

    Directions have density proportional to completeness; each random's redshift follows
    n_k(z) dV/dz of its field's class k (dV/dz dOmega = D_M^2 dchi/dz, Hogg 1999, eq. 28
    [from memory], as in :func:`corrpipe.mocks.survey.survey_randoms`). Classes receive
    randoms in proportion to their area x completeness x integral of n_k dV, so the random
    density is proportional to the expected galaxy density everywhere.

    Returns
    -------
    ra, dec, z : ndarray of float64, shape (n_randoms,)
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(int(seed))
    n_randoms = int(n_randoms)
    if n_randoms <= 0:
        raise InputError(f"number of randoms must be positive, got {n_randoms}")
    z_grid = np.linspace(z_min, z_max, 2049)
    chi = np.asarray(cosmology.comoving_distance(z_grid))
    d_m = np.asarray(cosmology.transverse_distance(z_grid))
    n_classes = int(footprint.depth_class.max()) + 1
    dens = d_m**2 * np.gradient(chi, z_grid) * _density_grid(nz_of_class, z_grid, n_classes)
    cdf = np.concatenate([np.zeros((n_classes, 1)),
                          np.cumsum(0.5 * (dens[:, 1:] + dens[:, :-1]) * np.diff(z_grid),
                                    axis=1)], axis=1)
    per_sr = cdf[:, -1]
    # expected objects per field: owned area x completeness x integral of n_k dV per sr
    weight = footprint.owned_areas_sr() * footprint.completeness_values \
        * per_sr[footprint.depth_class]
    if not weight.sum() > 0:
        raise InputError("the per-class n(z) is zero in every field; no randoms can be drawn")
    # draw in each class separately: directions inside the class's fields, z from its n_k dV
    counts = rng.multinomial(n_randoms, np.bincount(footprint.depth_class, weights=weight,
                                                     minlength=n_classes) / weight.sum())
    ra, dec, z = (np.empty(n_randoms) for _ in range(3))
    done = 0
    for k in np.flatnonzero(counts):
        part = slice(done, done + counts[k])
        sub = footprint.depth_class == k
        r_k, d_k = _sample_class(footprint, sub, int(counts[k]), rng)
        ra[part], dec[part] = r_k, d_k
        z[part] = np.interp(rng.random(counts[k]), cdf[k] / per_sr[k], z_grid)
        done += int(counts[k])
    return ra, dec, z


def _sample_class(footprint: FieldFootprint, members: np.ndarray, n: int, rng):
    """Directions inside the fields of one class (density x completeness)."""
    ra, dec, _ = footprint.sample_fields(n, rng, only=members)
    return ra, dec
