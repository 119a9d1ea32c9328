"""Random catalogues that follow the angular footprint and the radial selection of the data.

Directions are uniform on the sphere inside a :class:`corrpipe.survey.footprint.Footprint`.
Redshifts are either drawn from the data with their weights (the "shuffled" randoms of common
practice) or drawn from a smoothed n(z) (a Gaussian-kernel density of the weighted data
redshifts, reflected at the redshift limits). Several independent sets can be labelled for
split-random RR (Keihänen et al. 2019). Everything is driven by an explicit seed.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from tqdm.auto import tqdm

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting
from corrpipe.survey.footprint import Footprint, FootprintMismatchWarning, footprint_from_data
from corrpipe.terminal import show_bars

__all__ = [
    "RandomCatalogue",
    "RandomsSettings",
    "box_randoms",
    "check_randoms_size",
    "make_local_randoms",
    "make_randoms",
    "outside_random_coverage",
]

_CHUNK = 1_000_000


def _generator(seed) -> np.random.Generator:
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is None:
        raise ConfigError("randoms need an explicit seed (randoms.seed or run.seed); "
                          "reproducible randoms are required")
    return np.random.default_rng(seed)


@dataclass(frozen=True, eq=False)
class RandomCatalogue:
    """Random points on the sky with redshifts and weights.

    Attributes
    ----------
    ra, dec : ndarray of float64, shape (n_randoms,)
        Directions in degrees.
    z : ndarray of float64, shape (n_randoms,)
        Redshifts.
    weights : ndarray of float64, shape (n_randoms,)
        Weights (carried from the data for shuffled redshifts, times completeness where the
        footprint asks for it).
    subset : ndarray of int64, shape (n_randoms,)
        Index of the independent random set each point belongs to (0 .. n_sets - 1).
    n_sets : int
        Number of independent sets (1 = no split).
    seed : int
        Seed the catalogue was drawn with (-1 if a Generator was passed).
    """

    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    weights: np.ndarray
    subset: np.ndarray
    n_sets: int = 1
    seed: int = -1

    def __len__(self) -> int:
        return int(self.ra.size)

    def select_set(self, k: int) -> RandomCatalogue:
        """The k-th independent set alone (for split-random RR)."""
        if not 0 <= k < self.n_sets:
            raise InputError(f"random set {k} does not exist; there are {self.n_sets}")
        sel = self.subset == k
        return RandomCatalogue(self.ra[sel], self.dec[sel], self.z[sel], self.weights[sel],
                               np.zeros(int(sel.sum()), dtype=np.int64), 1, self.seed)

    def positions(self, cosmology) -> np.ndarray:
        """Cartesian positions (n_randoms, 3) in Mpc/h with the observer at the origin."""
        from corrpipe.cosmology import sky_to_cartesian

        return sky_to_cartesian(self.ra, self.dec, self.z, cosmology)

    def to_hdf5_group(self, group) -> None:
        """Store the catalogue in an h5py group (for the ``randoms`` checkpoint)."""
        for name in ("ra", "dec", "z", "weights", "subset"):
            group.create_dataset(name, data=getattr(self, name))
        group.attrs["n_sets"] = int(self.n_sets)
        group.attrs["seed"] = int(self.seed)

    @classmethod
    def from_hdf5_group(cls, group) -> RandomCatalogue:
        """Read a catalogue written by :meth:`to_hdf5_group`."""
        arrays = [np.asarray(group[n][()]) for n in ("ra", "dec", "z", "weights", "subset")]
        return cls(*arrays, n_sets=int(group.attrs["n_sets"]), seed=int(group.attrs["seed"]))


def check_randoms_size(n_data: int, n_randoms: int, source: str = "randoms") -> None:
    """Raise InputError when a random catalogue has fewer points than the data."""
    if n_randoms < n_data:
        raise InputError(f"{source} has {n_randoms} points, fewer than the {n_data} data "
                         "objects; randoms must outnumber the data (typically 10-50x) or "
                         "their shot noise dominates the error bars. Raise "
                         "randoms.size_factor or supply a larger random file")


def _draw_redshifts(rng, n, data_z, data_w, mode, smoothing, z_min, z_max):
    if mode == "shuffle":
        idx = rng.integers(0, data_z.size, size=n)
        return data_z[idx], data_w[idx].copy()
    if mode == "smooth":
        if not smoothing > 0:
            raise ConfigError(f"randoms.smoothing = {smoothing} must be > 0 for smoothed n(z)")
        p = data_w / data_w.sum()
        z = data_z[rng.choice(data_z.size, size=n, p=p)] + smoothing * rng.standard_normal(n)
        # reflect at the limits: the boundary-corrected kernel density keeps the edge density
        for _ in range(4):
            z = np.where(z < z_min, 2 * z_min - z, z)
            z = np.where(z > z_max, 2 * z_max - z, z)
        return np.clip(z, z_min, z_max), np.ones(n)
    raise ConfigError(f"randoms.redshifts = {mode!r} is not 'shuffle' or 'smooth'")


def make_randoms(footprint: Footprint, data_z, data_weights=None, *,
                 size_factor: float = 20.0, n_randoms: int | None = None,
                 redshifts: str = "shuffle", smoothing: float = 0.01,
                 z_min: float | None = None, z_max: float | None = None,
                 n_sets: int = 1, seed: int | np.random.Generator | None = None,
                 progress: bool = True) -> RandomCatalogue:
    """Draw a random catalogue inside ``footprint`` following the data's redshifts.

    Parameters
    ----------
    footprint : Footprint
        Angular footprint (directions are uniform on the sphere inside it).
    data_z : array_like, shape (n_data,)
        Data redshifts.
    data_weights : array_like, shape (n_data,), optional
        Data weights (completeness/systematics, without FKP); carried to the randoms with
        shuffled redshifts, used as sampling weights for the smoothed n(z).
    size_factor : float
        Randoms per data object (ignored if ``n_randoms`` is given). Must be >= 1.
    n_randoms : int, optional
        Exact number of randoms.
    redshifts : {"shuffle", "smooth"}
        Redshifts (with weights) drawn from the data, or from a Gaussian-smoothed n(z).
    smoothing : float
        Kernel width in redshift for ``"smooth"``.
    z_min, z_max : float, optional
        Redshift limits for ``"smooth"`` (default: data range).
    n_sets : int
        Number of independent sets labelled in ``subset`` (split-random RR).
    seed : int or numpy.random.Generator
        Required; the same seed gives the same catalogue.
    progress : bool
        Show a progress bar.

    Returns
    -------
    RandomCatalogue
    """
    rng = _generator(seed)
    data_z = np.asarray(data_z, dtype=np.float64).ravel()
    n_data = data_z.size
    if n_data == 0:
        raise InputError("cannot draw randoms for an empty data catalogue")
    data_w = (np.ones(n_data) if data_weights is None
              else np.asarray(data_weights, dtype=np.float64).ravel())
    if data_w.shape != data_z.shape:
        raise InputError(f"randoms: {data_w.size} data weights for {n_data} redshifts")
    if not np.all(np.isfinite(data_z)) or not np.all(np.isfinite(data_w)):
        raise InputError("randoms: data redshifts or weights contain NaN/inf")
    if n_randoms is None:
        if not size_factor >= 1:
            raise ConfigError(f"randoms.size_factor = {size_factor} must be >= 1")
        n_randoms = int(round(size_factor * n_data))
    check_randoms_size(n_data, int(n_randoms), "the requested random catalogue")
    if not (isinstance(n_sets, (int, np.integer)) and 1 <= n_sets <= n_randoms):
        raise ConfigError(f"randoms.n_sets = {n_sets} must be an integer in [1, n_randoms]")
    lo = float(data_z.min()) if z_min is None else float(z_min)
    hi = float(data_z.max()) if z_max is None else float(z_max)

    parts = []
    with tqdm(total=n_randoms, desc="randoms", unit="pt", disable=not show_bars(progress)) as bar:
        left = n_randoms
        while left > 0:
            m = min(_CHUNK, left)
            ra, dec = footprint.sample(m, rng)
            z, w = _draw_redshifts(rng, m, data_z, data_w, redshifts, smoothing, lo, hi)
            if footprint.completeness_as_weight:
                w = w * footprint.completeness(ra, dec)
            parts.append((ra, dec, z, w))
            left -= m
            bar.update(m)
    ra, dec, z, w = (np.concatenate(c) for c in zip(*parts))
    subset = np.arange(n_randoms, dtype=np.int64) % n_sets
    used_seed = int(seed) if isinstance(seed, (int, np.integer)) else -1
    return RandomCatalogue(ra, dec, z, w, subset, int(n_sets), used_seed)


def make_local_randoms(footprint, selection, n_randoms: int, *, n_sets: int = 1,
                       class_counts=None, seed: int | np.random.Generator | None = None,
                       progress: bool = True) -> tuple[RandomCatalogue, np.ndarray]:
    """Randoms in a field footprint whose redshifts follow each depth class's own selection.

    Parameters
    ----------
    footprint : corrpipe.survey.fields.FieldFootprint
        Fields with completeness and depth classes; the random density in a field is
        proportional to its completeness.
    selection : ShuffledByClass or TabulatedSelection
        Anything with ``draw(classes, rng) -> (z, weights)`` and ``check_classes(used)``
        (see :mod:`corrpipe.survey.selection`).
    n_randoms : int
        Number of randoms.
    n_sets : int
        Independent sets labelled in ``subset`` (split-random RR).
    class_counts : array_like, shape (n_classes,), optional
        Objects observed (or expected) in each depth class. Given, each class receives
        randoms in proportion to it, so the angular random density follows each class's own
        surface density (deeper classes hold more objects per area); without it every class
        has the same density per unit effective area.
    seed : int or numpy.random.Generator
        Required; the same seed gives the same catalogue.
    progress : bool
        Show a progress bar.

    Returns
    -------
    RandomCatalogue
        The randoms.
    ndarray of int64, shape (n_randoms,)
        Field each random lies in (its depth class is ``footprint.depth_class[field]``).

    Notes
    -----
    The output arrays are allocated once and filled chunk by chunk, so the peak memory is the
    catalogue itself plus one chunk.
    """
    rng = _generator(seed)
    n_randoms = int(n_randoms)
    if n_randoms < 1:
        raise ConfigError(f"the random catalogue needs at least one point; got {n_randoms}")
    if not (isinstance(n_sets, (int, np.integer)) and 1 <= n_sets <= n_randoms):
        raise ConfigError(f"randoms.n_sets = {n_sets} must be an integer in [1, n_randoms]")
    weight = footprint.owned_areas_sr() * footprint.completeness_values
    class_area = np.bincount(footprint.depth_class, weights=weight)
    density = None
    if class_counts is not None:
        counts = np.zeros(class_area.size)
        given = np.asarray(class_counts, dtype=np.float64)[:class_area.size]
        counts[:given.size] = given
        if np.any(~np.isfinite(counts)) or np.any(counts < 0) or not counts.sum() > 0:
            raise InputError("class_counts must be finite, >= 0 and not all 0")
        per_area = np.divide(counts, class_area, out=np.zeros_like(counts),
                             where=class_area > 0)
        density = per_area[footprint.depth_class]
        class_area = class_area * (per_area > 0)
    selection.check_classes(class_area > 0)
    ra, dec, z, w = (np.empty(n_randoms) for _ in range(4))
    fields = np.empty(n_randoms, dtype=np.int64)
    with tqdm(total=n_randoms, desc="randoms", unit="pt", disable=not show_bars(progress)) as bar:
        done = 0
        while done < n_randoms:
            m = min(_CHUNK, n_randoms - done)
            part = slice(done, done + m)
            ra[part], dec[part], fields[part] = footprint.sample_fields(m, rng,
                                                                       density=density)
            z[part], w[part] = selection.draw(footprint.depth_class[fields[part]], rng)
            done += m
            bar.update(m)
    subset = np.arange(n_randoms, dtype=np.int64) % n_sets
    used_seed = int(seed) if isinstance(seed, (int, np.integer)) else -1
    return RandomCatalogue(ra, dec, z, w, subset, int(n_sets), used_seed), fields


def box_randoms(n: int, box_size: float, seed) -> np.ndarray:
    """Uniform points in a cubic box, shape (n, 3), Mpc/h (``box_size`` in Mpc/h)."""
    if not box_size > 0:
        raise InputError(f"box randoms: box_size = {box_size} Mpc/h must be > 0")
    return _generator(seed).random((int(n), 3)) * float(box_size)


def outside_random_coverage(data_ra, data_dec, random_ra, random_dec, nside: int = 64,
                            warn_above: float = 0.01) -> float:
    """Fraction of data in HEALPix pixels that hold no random point (warns above a threshold).

    Use it for user-supplied randoms, where no footprint object exists. Choose ``nside`` so
    that a pixel holds many randoms, or empty pixels inside the survey inflate the fraction.
    """
    cover = footprint_from_data(random_ra, random_dec, nside=nside)
    inside = cover.contains(data_ra, data_dec)
    frac = float(1.0 - inside.mean()) if inside.size else 0.0
    if frac > warn_above:
        warnings.warn(f"{100 * frac:.2f}% of the data lies in HEALPix pixels (nside {nside}) "
                      "with no random point: the random catalogue does not cover the data "
                      "footprint", FootprintMismatchWarning, stacklevel=2)
    return frac


@dataclass(frozen=True)
class RandomsSettings:
    """Config section ``[randoms]``: how the random catalogue is made or read."""

    size_factor: float = setting(20.0, "randoms per data object", low=1.0)
    n_sets: int = setting(1, "independent random sets for split-random RR "
                             "(Keihänen et al. 2019); 1 = one catalogue", low=1)
    redshifts: str = setting("shuffle", "random redshifts drawn from the data (with weights), "
                             "from a smoothed n(z), from the data of the same depth class "
                             "(field footprints), or from a per-class dN/dz table",
                             choices=("shuffle", "smooth", "shuffle_by_class", "table"))
    selection_file: str = setting("", "dN/dz table per depth class (columns depth_class, "
                                  "z_min, z_max, dndz) for redshifts = 'table'", path=True, neutral_default=True)
    smoothing: float = setting(0.01, "Gaussian kernel width of the smoothed n(z)",
                               unit="redshift", low=0.0, low_open=True, high=0.5)
    seed: int = setting(-1, "random seed; -1 derives it from run.seed", low=-1)
    file: str = setting("", "use this random catalogue file instead of drawing randoms",
                        path=True)
    outside_warn_fraction: float = setting(0.01, "warn when more than this fraction of the "
                                           "data lies outside the random footprint",
                                           low=0.0, high=1.0)
    coverage_nside: int = setting(64, "HEALPix nside of the coverage check for supplied "
                                      "random files", low=1, high=8192)
