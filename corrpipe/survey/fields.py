"""Footprints made of many small fields: squares, rectangles and circles on the sky.

A :class:`FieldFootprint` holds a table of fields (centre, shape, size, position angle,
completeness, depth class) and answers the :class:`~corrpipe.survey.footprint.Footprint`
questions exactly at the field edges: containment uses each field's own geometry (angular
distance for circles, great-circle edges for rectangles); a coarse sky grid
(:mod:`corrpipe.survey.field_kernels`) only narrows the fields a direction is tested against.

Geometry
--------
* A circle of radius r is the spherical cap of angular radius r about the centre.
* A rectangle with sides (s_a, s_b) and position angle PA is the region whose gnomonic
  (tangent-plane) projection about its centre is the rectangle |x| <= tan(s_a/2),
  |y| <= tan(s_b/2), where x runs along PA (measured from north through east, common
  practice) and y perpendicular to it: four great-circle edges, and the angular distance from
  the centre to the middle of each edge is half the side. A square is s_a = s_b.

Overlaps and vetoes
-------------------
Fields may overlap; a direction covered by several belongs to the one listed first (its
completeness and depth class apply), so overlaps are counted once. Vetoes (bright-star holes
and the like) are another field table whose fields are removed. The area of a field that no
other field or veto touches is exact; for a touched field the part it owns is measured by
sampling it (``overlap_samples`` points, stated error in :meth:`FieldFootprint.area_error_sr`).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from scipy.spatial import cKDTree

from corrpipe.errors import InputError
from corrpipe.survey import field_kernels as fk
from corrpipe.survey.checks import quote_rows
from corrpipe.survey.footprint import Footprint, _as_angles

__all__ = ["CIRCLE", "RECTANGLE", "FieldFootprint", "cap_area_sr", "rectangle_area_sr",
           "unit_vectors_rad"]

CIRCLE = 0
"""Shape code of a circular field (spherical cap)."""
RECTANGLE = 1
"""Shape code of a rectangular (or square) field with great-circle edges."""

_MAX_SIZE_DEG = 90.0


def cap_area_sr(radius_rad) -> np.ndarray:
    """Solid angle of a spherical cap, 2 pi (1 - cos r) = 4 pi sin^2(r / 2), in sr.

    Notes
    -----
    Archimedes' hat-box theorem (common practice); the sin^2 form keeps precision for small r.
    """
    return 4.0 * np.pi * np.sin(0.5 * np.asarray(radius_rad, dtype=np.float64)) ** 2


def rectangle_area_sr(side_a_rad, side_b_rad) -> np.ndarray:
    """Solid angle of a gnomonic rectangle with angular sides (s_a, s_b), in sr.

    Notes
    -----
    Omega = 4 arcsin(sin(s_a / 2) sin(s_b / 2)), the solid angle of a right rectangular
    pyramid with apex angles s_a and s_b (closed form quoted from memory; checked in the tests
    against a scipy integral of dx dy / (1 + x^2 + y^2)^(3/2) and against L'Huilier's theorem).
    """
    a = 0.5 * np.asarray(side_a_rad, dtype=np.float64)
    b = 0.5 * np.asarray(side_b_rad, dtype=np.float64)
    return 4.0 * np.arcsin(np.sin(a) * np.sin(b))


def unit_vectors_rad(ra_rad, dec_rad) -> np.ndarray:
    """Unit vectors, shape (n, 3), of directions in radians."""
    cd = np.cos(dec_rad)
    return np.column_stack([cd * np.cos(ra_rad), cd * np.sin(ra_rad), np.sin(dec_rad)])


def _check_rows(where: str, column: str, bad: np.ndarray, problem: str, fix: str) -> None:
    if np.any(bad):
        rows = np.flatnonzero(bad)
        raise InputError(f"{where}: column {column!r} has {rows.size} of {bad.size} fields "
                         f"{problem} (rows, counted from 0: {quote_rows(rows)}); {fix}")


@dataclass(frozen=True, eq=False)
class _SkyGrid:
    """Candidate fields per sky cell (see :mod:`corrpipe.survey.field_kernels`)."""

    band: float
    n_ra: np.ndarray
    key_stride: int
    keys: np.ndarray          # sorted unique cell keys
    starts: np.ndarray        # offsets of each key's list in ``fields``
    fields: np.ndarray        # field indices, grouped by key, table order inside a key

    @classmethod
    def build(cls, ra, dec, radius) -> _SkyGrid:
        band = float(np.clip(2.0 * np.percentile(radius, 90), 2e-6, np.pi / 2))
        while True:
            n_bands = max(1, int(np.ceil(np.pi / band)))
            band = np.pi / n_bands
            edge = -0.5 * np.pi + band * np.arange(n_bands + 1)
            nearest = np.minimum(np.abs(edge[:-1]), np.abs(edge[1:]))
            nearest[(edge[:-1] < 0) & (edge[1:] > 0)] = 0.0
            n_ra = np.maximum(1, np.floor(2 * np.pi * np.cos(nearest) / band)).astype(np.int64)
            counts = fk.count_cells(ra, dec, radius, band, n_ra)
            if counts.sum() <= 16 * ra.size + 1_000_000 or band >= np.pi / 2:
                break
            band *= 2.0
        starts = np.zeros(ra.size + 1, dtype=np.int64)
        np.cumsum(counts, out=starts[1:])
        keys = np.empty(int(starts[-1]), dtype=np.int64)
        fields = np.empty(int(starts[-1]), dtype=np.int64)
        key_stride = int(n_ra.max())
        fk.fill_cells(ra, dec, radius, band, n_ra, key_stride, starts, keys, fields)
        order = np.argsort(keys, kind="stable")
        keys, fields = keys[order], fields[order]
        ukeys, first = np.unique(keys, return_index=True)
        return cls(band, n_ra, key_stride, ukeys, np.append(first, keys.size).astype(np.int64),
                   fields)

@dataclass(frozen=True, eq=False)
class FieldFootprint(Footprint):
    """A footprint made of many fields (circles, squares, rectangles), with optional vetoes.

    Parameters
    ----------
    ra, dec : array_like, shape (n_fields,)
        Field centres in degrees.
    shape : array_like of int, shape (n_fields,)
        :data:`CIRCLE` or :data:`RECTANGLE` per field.
    side_a, side_b : array_like, shape (n_fields,)
        Rectangle sides in degrees (side_a along the position angle); ignored for circles.
    position_angle : array_like, shape (n_fields,)
        Direction of side_a, degrees from north through east.
    radius : array_like, shape (n_fields,)
        Circle radii in degrees; ignored for rectangles.
    completeness : array_like, shape (n_fields,), optional
        Fraction of targets observed in each field, in [0, 1] (default 1). Random density is
        proportional to it.
    depth_class : array_like of int, shape (n_fields,), optional
        Group of fields sharing one radial selection (default: all in class 0).
    vetoes : FieldFootprint, optional
        Holes removed from every field (their own completeness is ignored).
    source : str
        Where the table came from (quoted in errors).
    overlap_samples : int
        Points drawn in each field touched by another field or a veto to measure the part
        it owns.

    Notes
    -----
    Sides and radii must be positive and below 90 degrees.
    """

    ra: np.ndarray
    dec: np.ndarray
    shape: np.ndarray
    side_a: np.ndarray
    side_b: np.ndarray
    position_angle: np.ndarray
    radius: np.ndarray
    completeness_values: np.ndarray | None = None
    depth_class: np.ndarray | None = None
    vetoes: FieldFootprint | None = None
    source: str = "<field arrays>"
    overlap_samples: int = 4096
    _geometry: dict = field(default_factory=dict, repr=False)

    def __post_init__(self):
        where = self.source
        ra, dec = _as_angles(self.ra, self.dec)
        n = ra.size
        if n == 0:
            raise InputError(f"{where}: the field table has no rows; give at least one field")

        def column(values, default, dtype=np.float64):
            arr = np.full(n, default, dtype=dtype) if values is None else \
                np.broadcast_to(np.asarray(values, dtype=dtype), (n,)).copy()
            return arr

        shape = column(self.shape, RECTANGLE, np.int64)
        side_a, side_b = column(self.side_a, np.nan), column(self.side_b, np.nan)
        pa, radius = column(self.position_angle, 0.0), column(self.radius, np.nan)
        comp = column(self.completeness_values, 1.0)
        cls = column(self.depth_class, 0, np.int64)
        is_circle = shape == CIRCLE
        _check_rows(where, "shape", (shape != CIRCLE) & (shape != RECTANGLE), "with an "
                    "unknown shape", "use 'circle', 'square' or 'rectangle'")
        _check_rows(where, "ra", ~np.isfinite(ra), "not finite", "give RA in degrees")
        _check_rows(where, "dec", ~(np.abs(dec) <= 90), "outside [-90, 90] deg",
                    "give Dec in degrees")
        for name, values, mask in (("radius", radius, is_circle),
                                   ("side_a", side_a, ~is_circle),
                                   ("side_b", side_b, ~is_circle)):
            _check_rows(where, name, mask & ~np.isfinite(values), "missing or not finite",
                        f"give a {name} for every such field")
            _check_rows(where, name, mask & np.isfinite(values) & (values <= 0),
                        "zero or negative", "sizes must be > 0")
            _check_rows(where, name, mask & (values >= _MAX_SIZE_DEG),
                        f"of {_MAX_SIZE_DEG:g} deg or more", "split such a field or check "
                        "the size unit")
        _check_rows(where, "position_angle", ~is_circle & ~np.isfinite(pa), "not finite",
                    "give the position angle in degrees (0 = side_a along north)")
        _check_rows(where, "completeness", ~((comp >= 0) & (comp <= 1)), "outside [0, 1]",
                    "completeness is the observed fraction of targets")
        if not np.any(comp > 0):
            raise InputError(f"{where}: every field has completeness 0; the footprint is empty")
        _check_rows(where, "depth_class", cls < 0, "negative", "depth classes are integers "
                    ">= 0")
        for name, value in (("ra", ra % 360.0), ("dec", dec), ("shape", shape),
                            ("side_a", side_a), ("side_b", side_b), ("position_angle", pa),
                            ("radius", radius), ("completeness_values", comp),
                            ("depth_class", cls)):
            value.setflags(write=False)
            object.__setattr__(self, name, value)
        self._build_geometry()

    # --- geometry ---------------------------------------------------------------------

    def _build_geometry(self) -> None:
        ra_r, dec_r = np.radians(self.ra), np.radians(self.dec)
        centre = unit_vectors_rad(ra_r, dec_r)
        east = np.column_stack([-np.sin(ra_r), np.cos(ra_r), np.zeros_like(ra_r)])
        north = np.column_stack([-np.sin(dec_r) * np.cos(ra_r), -np.sin(dec_r) * np.sin(ra_r),
                                 np.cos(dec_r)])
        pole = np.abs(self.dec) == 90.0
        east[pole] = [0.0, 1.0, 0.0]
        north[pole] = np.where(self.dec[pole, None] > 0, [[-1.0, 0.0, 0.0]], [[1.0, 0.0, 0.0]])
        pa = np.radians(self.position_angle)[:, None]
        axis1 = np.cos(pa) * north + np.sin(pa) * east
        axis2 = -np.sin(pa) * north + np.cos(pa) * east
        circle = self.shape == CIRCLE
        half_a = np.radians(np.where(circle, 1.0, self.side_a)) / 2
        half_b = np.radians(np.where(circle, 1.0, self.side_b)) / 2
        r = np.radians(np.where(circle, self.radius, 1.0))
        size1 = np.where(circle, 2.0 * np.sin(r / 2), np.tan(half_a))
        size2 = np.where(circle, 0.0, np.tan(half_b))
        bound = np.where(circle, r, np.arctan(np.hypot(np.tan(half_a), np.tan(half_b))))
        areas = np.where(circle, cap_area_sr(r), rectangle_area_sr(2 * half_a, 2 * half_b))
        grid = _SkyGrid.build(ra_r, dec_r, bound)
        self._geometry.update(centre=np.ascontiguousarray(centre),
                              axis1=np.ascontiguousarray(axis1),
                              axis2=np.ascontiguousarray(axis2), size1=size1, size2=size2,
                              bound=bound, areas=areas, grid=grid)

    def __len__(self) -> int:
        return int(self.ra.size)

    @property
    def n_fields(self) -> int:
        """Number of fields in the table."""
        return int(self.ra.size)

    def field_areas_sr(self) -> np.ndarray:
        """Exact solid angle of each field on its own (overlaps and vetoes ignored), sr."""
        return self._geometry["areas"].copy()

    def _kernel_args(self) -> tuple:
        g = self._geometry
        grid = g["grid"]
        return (grid.band, grid.n_ra, grid.key_stride, grid.keys, grid.starts, grid.fields,
                self.shape, g["centre"], g["axis1"], g["axis2"], g["size1"], g["size2"])

    def owner(self, ra_deg, dec_deg) -> np.ndarray:
        """Index of the field each direction belongs to (first listed), -1 outside or vetoed."""
        ra, dec = _as_angles(ra_deg, dec_deg)
        ra_r, dec_r = np.radians(ra).ravel(), np.radians(dec).ravel()
        own = fk.owners_of_angles(ra_r, dec_r, *self._kernel_args())
        if self.vetoes is not None:
            hole = fk.owners_of_angles(ra_r, dec_r, *self.vetoes._kernel_args()) >= 0
            own[hole] = -1
        return own.reshape(ra.shape)

    def contains(self, ra_deg, dec_deg) -> np.ndarray:
        return self.owner(ra_deg, dec_deg) >= 0

    def completeness(self, ra_deg, dec_deg) -> np.ndarray:
        own = self.owner(ra_deg, dec_deg)
        return np.where(own >= 0, self.completeness_values[np.maximum(own, 0)], 0.0)

    def depth_class_of(self, ra_deg, dec_deg) -> np.ndarray:
        """Depth class of the field owning each direction, -1 outside."""
        own = self.owner(ra_deg, dec_deg)
        return np.where(own >= 0, self.depth_class[np.maximum(own, 0)], -1)

    # --- overlaps and areas -----------------------------------------------------------

    @functools.cached_property
    def _neighbours(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """For each field, the fields listed earlier and the holes whose bounding caps meet
        its own: CSR offsets and indices (fields, then holes)."""
        g = self._geometry
        n = self.n_fields
        tree = cKDTree(g["centre"])
        reach = 2.0 * np.sin(np.minimum(2 * g["bound"].max(), np.pi) / 2)
        pairs = tree.query_pairs(reach, output_type="ndarray")
        early = _meeting(pairs[:, 1].copy(), g, pairs[:, 0].copy(), g)
        later, first = np.maximum(early[0], early[1]), np.minimum(early[0], early[1])
        f_start, f_list = _csr(later, first, n)
        if self.vetoes is None:
            return f_start, f_list, np.zeros(n + 1, dtype=np.int64), np.empty(0, np.int64)
        v = self.vetoes._geometry
        reach = 2.0 * np.sin(min(g["bound"].max() + v["bound"].max(), np.pi) / 2)
        hits = cKDTree(v["centre"]).query_ball_point(g["centre"], reach)
        sizes = np.fromiter((len(h) for h in hits), dtype=np.int64, count=n)
        rows = np.repeat(np.arange(n, dtype=np.int64), sizes)
        cols = np.fromiter((j for h in hits for j in h), dtype=np.int64, count=int(sizes.sum()))
        rows, cols = _meeting(rows, g, cols, v)
        v_start, v_list = _csr(rows, cols, n)
        return f_start, f_list, v_start, v_list

    @functools.cached_property
    def _touched(self) -> np.ndarray:
        """Fields that a field listed earlier, or a hole, may overlap (bounding caps meet)."""
        f_start, _, v_start, _ = self._neighbours
        return (np.diff(f_start) > 0) | (np.diff(v_start) > 0)

    def _not_owned(self, vec: np.ndarray, which: np.ndarray) -> np.ndarray:
        """True where a point drawn in field ``which`` lies in an earlier field or a hole."""
        f_start, f_list, v_start, v_list = self._neighbours
        g = self._geometry
        holes = self.vetoes._geometry if self.vetoes is not None else _NO_HOLES
        h_shape = self.vetoes.shape if self.vetoes is not None else np.empty(0, np.int64)
        return fk.covered_by_neighbours(
            np.ascontiguousarray(vec), np.ascontiguousarray(which, dtype=np.int64),
            f_start, f_list, self.shape, g["centre"], g["axis1"], g["axis2"], g["size1"],
            g["size2"], v_start, v_list, h_shape, holes["centre"], holes["axis1"],
            holes["axis2"], holes["size1"], holes["size2"])

    def _draw_in_fields(self, which: np.ndarray, rng: np.random.Generator
                        ) -> tuple[np.ndarray, np.ndarray]:
        """One proposal per entry of ``which`` (field indices): unit vectors and acceptance.

        Circles are sampled exactly; rectangles uniformly in the gnomonic plane and accepted
        with the gnomonic area element, so accepted points are uniform on the sphere (see
        :func:`corrpipe.survey.field_kernels.draw_in_fields`).
        """
        g = self._geometry
        m = which.size
        u = rng.random((3, m))
        return fk.draw_in_fields(np.ascontiguousarray(which, dtype=np.int64), u[0], u[1], u[2],
                                 self.shape, g["centre"], g["axis1"], g["axis2"], g["size1"],
                                 g["size2"])

    @functools.cached_property
    def _owned_fraction(self) -> tuple[np.ndarray, np.ndarray]:
        """Fraction of each field it owns, and its sampling error (0 for untouched fields).

        Touched fields are sampled on a jittered grid of about ``overlap_samples`` points
        (:func:`corrpipe.survey.field_kernels.owned_fractions`); the error quoted is the
        binomial one, an upper bound for stratified sampling.
        """
        frac, err = np.ones(self.n_fields), np.zeros(self.n_fields)
        touched = np.flatnonzero(self._touched).astype(np.int64)
        if touched.size == 0:
            return frac, err
        n_side = max(2, int(np.ceil(np.sqrt(self.overlap_samples))))
        jitter = np.random.default_rng(7_193_001).random((n_side * n_side, 2))
        f_start, f_list, v_start, v_list = self._neighbours
        g = self._geometry
        holes = self.vetoes._geometry if self.vetoes is not None else _NO_HOLES
        h_shape = self.vetoes.shape if self.vetoes is not None else np.empty(0, np.int64)
        f = fk.owned_fractions(touched, jitter, f_start, f_list, self.shape, g["centre"],
                               g["axis1"], g["axis2"], g["size1"], g["size2"], v_start, v_list,
                               h_shape, holes["centre"], holes["axis1"], holes["axis2"],
                               holes["size1"], holes["size2"])
        frac[touched] = f
        err[touched] = np.sqrt(f * (1 - f) / n_side**2)
        return frac, err

    def owned_areas_sr(self) -> np.ndarray:
        """Solid angle each field owns (overlaps with earlier fields and vetoes removed), sr."""
        return self._geometry["areas"] * self._owned_fraction[0]

    def area_sr(self) -> float:
        return float(self.owned_areas_sr().sum())

    def effective_area_sr(self) -> float:
        """Completeness-weighted area, sr (the area the random density is normalised to)."""
        return float(np.sum(self.owned_areas_sr() * self.completeness_values))

    def area_error_sr(self) -> float:
        """One-sigma sampling error of :meth:`area_sr` (0 when no fields overlap or are vetoed)."""
        return float(np.sqrt(np.sum((self._geometry["areas"] * self._owned_fraction[1]) ** 2)))

    def class_areas_sr(self, effective: bool = True) -> np.ndarray:
        """Area of each depth class (completeness-weighted by default), sr."""
        w = self.owned_areas_sr() * (self.completeness_values if effective else 1.0)
        return np.bincount(self.depth_class, weights=w, minlength=int(self.depth_class.max()) + 1)

    # --- sampling ---------------------------------------------------------------------

    def sample_fields(self, n: int, rng: np.random.Generator, by_completeness: bool = True,
                      only=None, density=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Draw ``n`` directions with density proportional to the owning field's completeness.

        With ``by_completeness=False`` the density is uniform over the footprint instead;
        ``only`` (boolean, shape (n_fields,)) restricts the draw to those fields; ``density``
        (shape (n_fields,), >= 0) multiplies each field's density by a factor of its own
        (e.g. the number of objects per unit effective area of its depth class).
        Returns RA and Dec (degrees) and the owning field of each point.
        """
        weights = self._geometry["areas"] * (self.completeness_values if by_completeness
                                             else 1.0)
        if density is not None:
            weights = weights * np.asarray(density, dtype=np.float64)
        if only is not None:
            weights = np.where(np.asarray(only, dtype=bool), weights, 0.0)
        prob = weights / weights.sum()
        touched = self._touched
        fields = np.arange(self.n_fields, dtype=np.int64)
        out_vec, out_field, have, tries = [], [], 0, 0
        while have < n:
            m = max(1024, int(1.1 * (n - have)) + 64)
            # proposals per field from one multinomial draw: grouped by field, cheap to gather
            which = np.repeat(fields, rng.multinomial(m, prob))
            vec, ok = self._draw_in_fields(which, rng)
            check = ok & touched[which]
            if np.any(check):
                idx = np.flatnonzero(check)
                sub = vec[idx]
                ok[idx] = ~self._not_owned(sub, which[idx])
            out_vec.append(vec[ok])
            out_field.append(which[ok])
            have += int(ok.sum())
            tries += 1
            if tries > 1000:
                raise InputError(f"{self.source}: could not draw points inside the fields; "
                                 "the vetoes or overlaps seem to remove every field")
        vec = np.concatenate(out_vec) if len(out_vec) > 1 else out_vec[0]
        field_of = np.concatenate(out_field) if len(out_field) > 1 else out_field[0]
        # proposals come grouped by field: put them in random order (callers may truncate a
        # sample, which must not cut off the last fields) and drop the surplus
        keep = rng.permutation(vec.shape[0])[:n]
        vec, field_of = vec[keep], field_of[keep]
        ra, dec = fk.vectors_to_angles_deg(vec)
        return ra, dec, field_of

    def sample(self, n, rng):
        """Draw ``n`` directions; density proportional to completeness (degrees)."""
        ra, dec, _ = self.sample_fields(n, rng)
        return ra, dec


_NO_HOLES = {"centre": np.empty((0, 3)), "axis1": np.empty((0, 3)), "axis2": np.empty((0, 3)),
             "size1": np.empty(0), "size2": np.empty(0)}
"""Geometry of an empty set of holes."""


def _meeting(rows, g_rows, cols, g_cols) -> tuple[np.ndarray, np.ndarray]:
    """The (row, col) pairs whose bounding caps meet (angle <= sum of bounding radii)."""
    if rows.size == 0:
        return rows, cols
    chord = np.linalg.norm(g_rows["centre"][rows] - g_cols["centre"][cols], axis=1)
    angle = 2.0 * np.arcsin(np.minimum(1.0, 0.5 * chord))
    meet = angle <= g_rows["bound"][rows] + g_cols["bound"][cols] + 1e-12
    return rows[meet], cols[meet]


def _csr(rows, cols, n) -> tuple[np.ndarray, np.ndarray]:
    """CSR offsets (n + 1) and column lists sorted by row, then column."""
    order = np.lexsort((cols, rows))
    start = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=start[1:])
    return start, np.ascontiguousarray(cols[order], dtype=np.int64)
