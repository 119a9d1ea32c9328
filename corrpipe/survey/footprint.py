"""Angular survey footprints: RA/Dec boxes, their unions and vetoes, and HEALPix maps.

A footprint answers four questions about a direction on the sky (angles in degrees):
is it inside (:meth:`contains`), how complete is the survey there (:meth:`completeness`,
between 0 and 1), how large is the footprint (:meth:`area_sr`, :meth:`area_deg2`), and how
to draw directions uniformly inside it (:meth:`sample`). Pixel maths is done by
``astropy_healpix``; map files are read with ``astropy.io.fits``.
"""

from __future__ import annotations

import dataclasses
import functools
import os
import warnings
from dataclasses import dataclass
from typing import Sequence

import astropy.units as u
import astropy_healpix as ahp
import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting

__all__ = [
    "Footprint",
    "SkyBox",
    "BoxFootprint",
    "HealpixFootprint",
    "FootprintSettings",
    "FootprintMismatchWarning",
    "SQ_DEG_PER_SR",
    "read_healpix_map",
    "footprint_from_data",
    "footprint_from_settings",
    "outside_fraction",
    "check_data_inside",
]

SQ_DEG_PER_SR = (180.0 / np.pi) ** 2
"""Square degrees in one steradian."""


class FootprintMismatchWarning(UserWarning):
    """Too much of the data lies outside the random footprint."""


def _as_angles(ra_deg, dec_deg) -> tuple[np.ndarray, np.ndarray]:
    ra = np.atleast_1d(np.asarray(ra_deg, dtype=np.float64))
    dec = np.atleast_1d(np.asarray(dec_deg, dtype=np.float64))
    if ra.shape != dec.shape:
        raise InputError(f"ra and dec must have the same shape; got {ra.shape} and {dec.shape}")
    return ra, dec


def _batched_rejection(draw, accept, n: int, rng: np.random.Generator, what: str):
    """Draw ``n`` accepted directions: ``draw(m, rng)`` proposes, ``accept(ra, dec, rng)`` keeps."""
    out_ra, out_dec, have, tries = [], [], 0, 0
    while have < n:
        m = max(1024, int(1.3 * (n - have)) + 16)
        ra, dec = draw(m, rng)
        keep = accept(ra, dec, rng)
        out_ra.append(ra[keep])
        out_dec.append(dec[keep])
        have += int(keep.sum())
        tries += 1
        if tries > 1000:
            raise InputError(f"could not draw directions inside {what}: acceptance is ~0; "
                             "check that the footprint is not empty")
    return np.concatenate(out_ra)[:n], np.concatenate(out_dec)[:n]


class Footprint:
    """Base class of angular footprints (RA, Dec in degrees)."""

    def contains(self, ra_deg, dec_deg) -> np.ndarray:
        """Boolean mask of the directions inside the footprint."""
        raise NotImplementedError

    def completeness(self, ra_deg, dec_deg) -> np.ndarray:
        """Completeness in [0, 1] at each direction (0 outside the footprint)."""
        return self.contains(ra_deg, dec_deg).astype(np.float64)

    @property
    def completeness_as_weight(self) -> bool:
        """True when randoms should carry the completeness as a weight."""
        return False

    def area_sr(self) -> float:
        """Geometric sky area of the footprint in steradians."""
        raise NotImplementedError

    def effective_area_sr(self) -> float:
        """Completeness-weighted area in steradians (equal to the area for binary masks)."""
        return self.area_sr()

    def area_deg2(self) -> float:
        """Geometric sky area in square degrees."""
        return self.area_sr() * SQ_DEG_PER_SR

    def sample(self, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Draw ``n`` directions uniformly on the sphere inside the footprint (degrees)."""
        raise NotImplementedError


@dataclass(frozen=True)
class SkyBox(Footprint):
    """A zone of the sphere between two RA meridians and two declinations.

    Parameters
    ----------
    ra_min, ra_max : float
        RA limits in degrees, in [0, 360]. ``ra_min > ra_max`` means the box wraps through
        RA = 0 (e.g. 350 -> 10 spans 20 degrees).
    dec_min, dec_max : float
        Dec limits in degrees, -90 <= dec_min < dec_max <= 90.

    Notes
    -----
    Area = ΔRA [rad] × (sin dec_max − sin dec_min) sr, the area of a zone of a spherical
    cap cut by two meridians (common practice; any spherical-geometry text).
    """

    ra_min: float
    ra_max: float
    dec_min: float
    dec_max: float

    def __post_init__(self):
        for name in ("ra_min", "ra_max"):
            v = getattr(self, name)
            if not (0.0 <= v <= 360.0) or not np.isfinite(v):
                raise ConfigError(f"sky box {name} = {v} deg is outside [0, 360]")
        if not (-90.0 <= self.dec_min < self.dec_max <= 90.0):
            raise ConfigError(f"sky box needs -90 <= dec_min < dec_max <= 90 deg; got "
                              f"dec_min = {self.dec_min}, dec_max = {self.dec_max}")
        if self.ra_min == self.ra_max:
            raise ConfigError(f"sky box has zero RA width (ra_min = ra_max = {self.ra_min}); "
                              "use 0 and 360 for a full ring")

    @property
    def ra_width(self) -> float:
        """RA extent in degrees (through RA = 0 when the box wraps)."""
        return (self.ra_max - self.ra_min) % 360.0 or 360.0

    def contains(self, ra_deg, dec_deg) -> np.ndarray:
        ra, dec = _as_angles(ra_deg, dec_deg)
        offset = (ra - self.ra_min) % 360.0
        return (offset <= self.ra_width) & (dec >= self.dec_min) & (dec <= self.dec_max)

    def area_sr(self) -> float:
        return float(np.radians(self.ra_width) * (np.sin(np.radians(self.dec_max))
                                                   - np.sin(np.radians(self.dec_min))))

    def sample(self, n, rng):
        ra = (self.ra_min + self.ra_width * rng.random(n)) % 360.0
        lo, hi = np.sin(np.radians(self.dec_min)), np.sin(np.radians(self.dec_max))
        dec = np.degrees(np.arcsin(lo + (hi - lo) * rng.random(n)))
        return ra, dec

    def ra_pieces(self) -> list[tuple[float, float]]:
        """The RA intervals of the box without wrapping (one or two pieces)."""
        if self.ra_min < self.ra_max:
            return [(self.ra_min, self.ra_max)]
        return [(self.ra_min, 360.0), (0.0, self.ra_max)]


@dataclass(frozen=True)
class BoxFootprint(Footprint):
    """Union of sky boxes minus the union of veto boxes.

    Parameters
    ----------
    include : tuple of SkyBox
        Boxes whose union is the survey area (they may overlap).
    exclude : tuple of SkyBox
        Veto boxes removed from it.

    Notes
    -----
    In the (RA, sin Dec) plane every box is a rectangle and sky area is plane area (the map is
    equal-area; Lambert 1772, common practice), so the area of any union/difference is found
    exactly by cutting the plane on all box edges and summing the cells that are inside.
    """

    include: tuple
    exclude: tuple = ()

    def __post_init__(self):
        if len(self.include) == 0:
            raise ConfigError("a box footprint needs at least one box in 'boxes'")

    def contains(self, ra_deg, dec_deg):
        ra, dec = _as_angles(ra_deg, dec_deg)
        inside = np.zeros(ra.shape, dtype=bool)
        for box in self.include:
            inside |= box.contains(ra, dec)
        for box in self.exclude:
            inside &= ~box.contains(ra, dec)
        return inside

    def area_sr(self) -> float:
        boxes = list(self.include) + list(self.exclude)
        ra_cuts = sorted({0.0, 360.0} | {e for b in boxes for p in b.ra_pieces() for e in p})
        sd_cuts = sorted({float(np.sin(np.radians(e))) for b in boxes
                          for e in (b.dec_min, b.dec_max)})
        ra_c, sd_c = np.asarray(ra_cuts), np.asarray(sd_cuts)
        ra_mid = 0.5 * (ra_c[1:] + ra_c[:-1])
        sd_mid = 0.5 * (sd_c[1:] + sd_c[:-1])
        g_ra, g_sd = np.meshgrid(ra_mid, sd_mid, indexing="ij")
        inside = self.contains(g_ra.ravel(), np.degrees(np.arcsin(g_sd.ravel())))
        cell = np.outer(np.radians(np.diff(ra_c)), np.diff(sd_c)).ravel()
        return float(np.sum(cell[inside]))

    def sample(self, n, rng):
        areas = np.array([b.area_sr() for b in self.include])
        prob = areas / areas.sum()

        def draw(m, g):
            which = g.choice(len(self.include), size=m, p=prob)
            ra, dec = np.empty(m), np.empty(m)
            for j, box in enumerate(self.include):
                sel = which == j
                ra[sel], dec[sel] = box.sample(int(sel.sum()), g)
            return ra, dec

        def accept(ra, dec, g):
            # a point covered by c include boxes is proposed c times as often: keep 1/c of them
            cover = np.zeros(ra.shape)
            for box in self.include:
                cover += box.contains(ra, dec)
            keep = g.random(ra.shape) * cover < 1.0
            for box in self.exclude:
                keep &= ~box.contains(ra, dec)
            return keep

        return _batched_rejection(draw, accept, n, rng, "the box footprint")


def _validate_nside(nside, where: str) -> int:
    try:
        value = int(nside)
        if value != nside or value < 1:
            raise ValueError
        ahp.nside_to_npix(value)
    except (ValueError, TypeError) as exc:
        raise InputError(f"{where}: nside = {nside!r} is invalid; HEALPix nside must be a "
                         "positive power of two (1, 2, 4, ..., 8192)") from exc
    return value


def _validate_order(order, where: str) -> str:
    text = str(order).strip().lower()
    if text in ("ring",):
        return "ring"
    if text in ("nested", "nest"):
        return "nested"
    raise InputError(f"{where}: HEALPix ordering {order!r} is not 'ring' or 'nested'")


@dataclass(frozen=True, eq=False)
class HealpixFootprint(Footprint):
    """Footprint given by a HEALPix completeness map.

    Parameters
    ----------
    values : ndarray of float64, shape (12 nside^2,)
        Completeness per pixel (0 = not observed, 1 = complete). NaN and the HEALPix
        UNSEEN sentinel (-1.6375e30) count as 0.
    nside : int
        HEALPix resolution (power of two).
    order : {"ring", "nested"}
        Pixel ordering of ``values``.
    threshold : float
        Pixels with completeness >= threshold (and > 0) are inside.
    weight_by_completeness : bool
        If True, randoms carry the pixel completeness as a weight (and the effective area is
        completeness-weighted); otherwise the mask is binary.
    """

    values: np.ndarray
    nside: int
    order: str = "ring"
    threshold: float = 0.0
    weight_by_completeness: bool = False
    source: str = "<array>"

    def __post_init__(self):
        nside = _validate_nside(self.nside, self.source)
        order = _validate_order(self.order, self.source)
        vals = np.asarray(self.values, dtype=np.float64).ravel()
        npix = int(ahp.nside_to_npix(nside))
        if vals.size != npix:
            raise InputError(f"{self.source}: map has {vals.size} pixels but nside = {nside} "
                             f"needs 12 nside^2 = {npix}")
        vals = np.where(np.isfinite(vals) & (vals > -1e30), vals, 0.0)
        if np.any(vals < 0) or np.any(vals > 1 + 1e-6):
            raise InputError(f"{self.source}: completeness values must lie in [0, 1]; found "
                             f"range [{vals.min():.4g}, {vals.max():.4g}]")
        if not (0.0 <= self.threshold <= 1.0):
            raise ConfigError(f"completeness threshold = {self.threshold} is outside [0, 1]")
        object.__setattr__(self, "values", vals)
        object.__setattr__(self, "nside", nside)
        object.__setattr__(self, "order", order)
        keep = (vals > 0) & (vals >= self.threshold)
        object.__setattr__(self, "_keep", keep)
        object.__setattr__(self, "_pixels", np.flatnonzero(keep))
        if not keep.any():
            raise InputError(f"{self.source}: no pixel has completeness >= {self.threshold}; "
                             "the footprint is empty (lower the threshold or check the map)")

    @property
    def completeness_as_weight(self) -> bool:
        return bool(self.weight_by_completeness)

    @property
    def pixels(self) -> np.ndarray:
        """Indices of the pixels inside the footprint (in ``order``)."""
        return self._pixels

    def pixel_of(self, ra_deg, dec_deg) -> np.ndarray:
        """HEALPix pixel index of each direction in this map's resolution and ordering."""
        ra, dec = _as_angles(ra_deg, dec_deg)
        return np.asarray(ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, self.nside,
                                                order=self.order))

    def contains(self, ra_deg, dec_deg):
        return self._keep[self.pixel_of(ra_deg, dec_deg)]

    def completeness(self, ra_deg, dec_deg):
        pix = self.pixel_of(ra_deg, dec_deg)
        return np.where(self._keep[pix], self.values[pix], 0.0)

    def pixel_area_sr(self) -> float:
        """Area of one pixel in steradians (4 pi / 12 nside^2)."""
        return float(ahp.nside_to_pixel_area(self.nside).to_value(u.sr))

    def area_sr(self):
        return self._pixels.size * self.pixel_area_sr()

    def effective_area_sr(self):
        if not self.weight_by_completeness:
            return self.area_sr()
        return float(self.values[self._pixels].sum()) * self.pixel_area_sr()

    def sample(self, n, rng):
        """Uniform directions inside the kept pixels.

        Notes
        -----
        All HEALPix pixels have equal area and the pixel-face coordinates (dx, dy) of the
        HEALPix projection are equal-area (Górski et al. 2005, §4), so a uniformly chosen kept
        pixel and uniform (dx, dy) in it give a uniform density on the sphere.
        """
        pix = self._pixels[rng.integers(0, self._pixels.size, size=n)]
        lon, lat = ahp.healpix_to_lonlat(pix, self.nside, dx=rng.random(n), dy=rng.random(n),
                                         order=self.order)
        return np.asarray(lon.to_value(u.deg)) % 360.0, np.asarray(lat.to_value(u.deg))


def read_healpix_map(path: str | os.PathLike, column: str | int = 0, *,
                     threshold: float = 0.0, weight_by_completeness: bool = False
                     ) -> HealpixFootprint:
    """Read a HEALPix completeness map from a FITS file.

    Parameters
    ----------
    path : path-like
        FITS file with the map in a binary table (first table HDU), as the HEALPix FITS
        convention has it: header keys ``NSIDE`` and ``ORDERING`` (``RING``/``NESTED``);
        ``INDXSCHM = EXPLICIT`` partial maps with a ``PIXEL`` column are also read. A map in
        the primary image HDU (with the same header keys) is accepted too.
    column : str or int
        Table column holding the completeness (name or index; default the first non-PIXEL).
    threshold, weight_by_completeness
        See :class:`HealpixFootprint`.

    Raises
    ------
    InputError
        If the file is missing, not FITS, lacks a map, or has invalid NSIDE/ORDERING.
    """
    from astropy.io import fits

    where = f"footprint map '{os.fspath(path)}'"
    if not os.path.isfile(path):
        raise InputError(f"{where} does not exist; check footprint.healpix_file")
    try:
        with fits.open(path, memmap=False) as hdul:
            hdul.verify("silentfix")
            hdu = next((h for h in hdul[1:] if isinstance(h, fits.BinTableHDU)), None)
            header = (hdu if hdu is not None else hdul[0]).header
            if hdu is not None:
                data = hdu.data
                names = [c.name for c in hdu.columns]
                value_names = [c for c in names if c.upper() != "PIXEL"]
                if isinstance(column, int):
                    if column >= len(value_names):
                        raise InputError(f"{where}: column index {column} out of range; "
                                         f"columns are {value_names}")
                    cname = value_names[column]
                else:
                    match = [c for c in names if c.lower() == str(column).lower()]
                    if not match:
                        raise InputError(f"{where}: no column '{column}'; columns are {names}")
                    cname = match[0]
                values = np.asarray(data[cname], dtype=np.float64).ravel()
                explicit = str(header.get("INDXSCHM", "IMPLICIT")).upper() == "EXPLICIT"
                pixel = (np.asarray(data["PIXEL"], dtype=np.int64).ravel()
                         if explicit or "PIXEL" in [c.upper() for c in names] else None)
            elif hdul[0].data is not None:
                values = np.asarray(hdul[0].data, dtype=np.float64).ravel()
                pixel = None
            else:
                raise InputError(f"{where} holds no HEALPix map (no table HDU, empty image)")
    except InputError:
        raise
    except (OSError, ValueError, TypeError, KeyError, IndexError) as exc:
        raise InputError(f"{where} could not be read as a HEALPix FITS map ({exc}); "
                         "check that the file is complete and in FITS format") from exc

    if "NSIDE" in header:
        nside = _validate_nside(header["NSIDE"], where)
    elif pixel is None:
        try:
            nside = int(ahp.npix_to_nside(values.size))
        except ValueError as exc:
            raise InputError(f"{where}: no NSIDE key and {values.size} pixels is not "
                             "12 nside^2 for any nside") from exc
    else:
        raise InputError(f"{where}: partial (explicit) map without an NSIDE header key")
    order = _validate_order(header.get("ORDERING", "RING"), where)
    if pixel is not None:
        npix = int(ahp.nside_to_npix(nside))
        if pixel.size != values.size or pixel.min(initial=0) < 0 or pixel.max(initial=0) >= npix:
            raise InputError(f"{where}: PIXEL column does not match nside = {nside} "
                             f"(need indices in [0, {npix}) and one per value)")
        full = np.zeros(npix)
        full[pixel] = values
        values = full
    return HealpixFootprint(values, nside, order, threshold=threshold,
                            weight_by_completeness=weight_by_completeness, source=where)


def footprint_from_data(ra_deg, dec_deg, nside: int = 64, min_count: int = 1,
                        order: str = "nested") -> HealpixFootprint:
    """Footprint of the HEALPix pixels occupied by at least ``min_count`` data objects.

    Parameters
    ----------
    ra_deg, dec_deg : array_like
        Data directions in degrees.
    nside : int
        Resolution of the occupancy map (power of two). Pick it so a typical pixel holds
        several objects, or edges will be ragged and empty pixels inside the survey dropped.
    min_count : int
        Minimum number of objects for a pixel to count as observed.
    """
    ra, dec = _as_angles(ra_deg, dec_deg)
    nside = _validate_nside(nside, "footprint.data_nside")
    if ra.size == 0:
        raise InputError("cannot derive a footprint from an empty data catalogue")
    pix = ahp.lonlat_to_healpix(ra * u.deg, dec * u.deg, nside, order=order)
    counts = np.bincount(np.asarray(pix), minlength=int(ahp.nside_to_npix(nside)))
    values = (counts >= max(int(min_count), 1)).astype(np.float64)
    return HealpixFootprint(values, nside, order, threshold=0.5,
                            source=f"data occupancy map (nside {nside})")


def outside_fraction(footprint: Footprint, ra_deg, dec_deg, weights=None) -> float:
    """Weighted fraction of objects outside ``footprint``."""
    ra, dec = _as_angles(ra_deg, dec_deg)
    if ra.size == 0:
        return 0.0
    w = np.ones(ra.shape) if weights is None else np.asarray(weights, dtype=np.float64)
    inside = footprint.contains(ra, dec)
    return float(w[~inside].sum() / w.sum())


def check_data_inside(footprint: Footprint, ra_deg, dec_deg, weights=None,
                      warn_above: float = 0.01, name: str = "data") -> float:
    """Return the fraction of ``name`` outside the footprint; warn when above ``warn_above``.

    Data outside the area covered by the randoms bias the correlation function silently
    (common practice: compare the data and random footprints before counting pairs).
    """
    frac = outside_fraction(footprint, ra_deg, dec_deg, weights)
    if frac > warn_above:
        warnings.warn(f"{100 * frac:.2f}% of the {name} (weighted) lies outside the random "
                      f"footprint (threshold {100 * warn_above:.2f}%): check the footprint "
                      "file/boxes and the catalogue coordinates, or cut the data to the "
                      "footprint", FootprintMismatchWarning, stacklevel=2)
    return frac


@dataclass(frozen=True)
class FootprintSettings:
    """Config section ``[footprint]``: where the survey looked."""

    kind: str = setting("boxes", "how the footprint is given",
                        choices=("boxes", "healpix", "from_data", "fields"))
    boxes: tuple[tuple[float, float, float, float], ...] = setting((), "RA/Dec boxes [ra_min, ra_max, dec_min, dec_max] in degrees; "
                               "ra_min > ra_max wraps through RA = 0", unit="deg")
    vetoes: tuple[tuple[float, float, float, float], ...] = setting((), "boxes removed from the footprint, same layout as 'boxes'",
                            unit="deg")
    healpix_file: str = setting("", "HEALPix completeness map (FITS) for kind = 'healpix'",
                                path=True)
    healpix_column: str = setting("", "map column name (empty: first column)")
    completeness_threshold: float = setting(0.0, "pixels below this completeness are outside",
                                            low=0.0, high=1.0)
    completeness_as_weight: bool = setting(False, "weight randoms by pixel completeness")
    data_nside: int = setting(64, "HEALPix nside of the occupancy map for kind = 'from_data'",
                              low=1, high=8192)
    data_min_count: int = setting(1, "objects a pixel needs to count as observed",
                                  low=1)
    fields_file: str = setting("", "table of fields (FITS/ECSV/CSV: ra, dec, shape, side or "
                               "side_a/side_b, position_angle, radius, completeness, "
                               "depth_class) for kind = 'fields'", path=True, neutral_default=True)
    field_size_unit: str = setting("arcmin", "unit of the field sides and radii",
                                   choices=("deg", "arcmin", "arcsec"), neutral_default=True)
    field_vetoes_file: str = setting("", "table of holes (same columns) removed from the "
                                     "fields, e.g. bright-star masks", path=True, neutral_default=True)
    field_depth_groups: int = setting(0, "without a depth_class column: group the fields into "
                                      "this many classes of similar 'depth' (quantiles of "
                                      "that column); 0 = one class", low=0, neutral_default=True)
    field_overlap_samples: int = setting(4096, "points drawn in each field that another "
                                         "field or a hole touches, to measure its area",
                                         low=1000, neutral_default=True)

    def validate(self) -> None:
        """Check the boxes when the config is loaded, before any stage runs."""
        _boxes_from_config(self.boxes, "boxes")
        _boxes_from_config(self.vetoes, "vetoes")
        if self.kind == "fields":
            if not self.fields_file:
                raise ConfigError("footprint.kind = 'fields' needs footprint.fields_file (a "
                                  "table of fields)")
            if self.vetoes:
                raise ConfigError("footprint.vetoes (boxes) cannot be combined with kind = "
                                  "'fields'; give the holes as a field table in "
                                  "footprint.field_vetoes_file")


def _boxes_from_config(entries: Sequence, key: str) -> tuple:
    boxes = []
    for i, entry in enumerate(entries):
        try:
            values = [float(v) for v in entry]
        except (TypeError, ValueError) as exc:
            raise ConfigError(f"footprint.{key}[{i}] = {entry!r} is not a list of numbers") \
                from exc
        if len(values) != 4:
            raise ConfigError(f"footprint.{key}[{i}] has {len(values)} numbers; give "
                              "[ra_min, ra_max, dec_min, dec_max] in degrees")
        try:
            boxes.append(SkyBox(*values))
        except ConfigError as exc:
            raise ConfigError(f"footprint.{key}[{i}]: {exc}") from exc
    return tuple(boxes)


def footprint_from_settings(settings: FootprintSettings, data_ra=None,
                            data_dec=None) -> Footprint:
    """Build the footprint a ``[footprint]`` config section describes.

    ``data_ra``/``data_dec`` (degrees) are needed for ``kind = "from_data"``.
    """
    if settings.kind == "boxes":
        include = _boxes_from_config(settings.boxes, "boxes")
        if not include:
            raise ConfigError("footprint.kind = 'boxes' but footprint.boxes is empty; give at "
                              "least one [ra_min, ra_max, dec_min, dec_max]")
        return BoxFootprint(include, _boxes_from_config(settings.vetoes, "vetoes"))
    if settings.kind == "healpix":
        if not settings.healpix_file:
            raise ConfigError("footprint.kind = 'healpix' needs footprint.healpix_file")
        fp = read_healpix_map(settings.healpix_file, settings.healpix_column or 0,
                              threshold=settings.completeness_threshold,
                              weight_by_completeness=settings.completeness_as_weight)
        if settings.vetoes:
            return _VetoedFootprint(fp, _boxes_from_config(settings.vetoes, "vetoes"))
        return fp
    if settings.kind == "fields":
        raise ConfigError("footprint.kind = 'fields' is built by "
                          "corrpipe.survey.field_table.field_footprint_from_settings")
    if settings.kind == "from_data":
        if data_ra is None or data_dec is None:
            raise ConfigError("footprint.kind = 'from_data' needs the data RA/Dec; it cannot "
                              "be used for a periodic box catalogue")
        return footprint_from_data(data_ra, data_dec, settings.data_nside,
                                   settings.data_min_count)
    raise ConfigError(f"footprint.kind = {settings.kind!r} is not one of "
                      "'boxes', 'healpix', 'from_data', 'fields'")


@dataclasses.dataclass(frozen=True, eq=False)
class _VetoedFootprint(Footprint):
    """A HEALPix footprint with veto boxes removed (area estimated by Monte Carlo)."""

    base: HealpixFootprint
    vetoes: tuple
    n_area_samples: int = 2_000_000

    def contains(self, ra_deg, dec_deg):
        ra, dec = _as_angles(ra_deg, dec_deg)
        inside = self.base.contains(ra, dec)
        for box in self.vetoes:
            inside &= ~box.contains(ra, dec)
        return inside

    def completeness(self, ra_deg, dec_deg):
        return np.where(self.contains(ra_deg, dec_deg), self.base.completeness(ra_deg, dec_deg),
                        0.0)

    @property
    def completeness_as_weight(self):
        return self.base.completeness_as_weight

    @functools.cached_property
    def _kept_fraction(self) -> tuple[float, float]:
        rng = np.random.default_rng(20240917)
        ra, dec = self.base.sample(self.n_area_samples, rng)
        keep = self.contains(ra, dec)
        return float(keep.mean()), float(np.where(keep, self.base.completeness(ra, dec),
                                                  0.0).mean())

    def area_sr(self):
        return self.base.area_sr() * self._kept_fraction[0]

    def effective_area_sr(self):
        if not self.completeness_as_weight:
            return self.area_sr()
        # mean completeness over the base pixels times the base geometric area
        return self.base.area_sr() * self._kept_fraction[1]

    def sample(self, n, rng):
        return _batched_rejection(self.base.sample, lambda r, d, g: self.contains(r, d), n, rng,
                                  "the vetoed HEALPix footprint")
