"""Unions of footprints of any kind (field tables, RA/Dec boxes, HEALPix maps) with vetoes.

A direction covered by several parts belongs to the part listed first (its completeness
applies), so overlaps are counted once; a direction inside any veto is outside. Areas of the
union are measured by sampling each part uniformly and keeping the points it owns (the error
is stated by :meth:`FootprintUnion.area_error_sr`); the parts' own areas are exact.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from corrpipe.errors import InputError
from corrpipe.survey.fields import FieldFootprint
from corrpipe.survey.footprint import Footprint, _as_angles

__all__ = ["FootprintUnion"]


def _uniform_sample(part: Footprint, n: int, rng):
    if isinstance(part, FieldFootprint):
        ra, dec, _ = part.sample_fields(n, rng, by_completeness=False)
        return ra, dec
    return part.sample(n, rng)


@dataclass(frozen=True, eq=False)
class FootprintUnion(Footprint):
    """The union of ``parts`` minus the union of ``vetoes``.

    Parameters
    ----------
    parts : tuple of Footprint
        Footprints in priority order (the first one covering a direction owns it).
    vetoes : tuple of Footprint
        Holes removed from the union.
    area_samples : int
        Points drawn in each part to measure the part of it the union keeps.
    """

    parts: tuple
    vetoes: tuple = ()
    area_samples: int = 400_000

    def __post_init__(self):
        if len(self.parts) == 0:
            raise InputError("a footprint union needs at least one part")

    def owner(self, ra_deg, dec_deg) -> np.ndarray:
        """Index of the part owning each direction, -1 outside or vetoed."""
        ra, dec = _as_angles(ra_deg, dec_deg)
        own = np.full(ra.shape, -1, dtype=np.int64)
        for i, part in enumerate(self.parts):
            free = own < 0
            if np.any(free):
                hit = part.contains(ra[free], dec[free])
                own[np.flatnonzero(free)[hit]] = i
        for veto in self.vetoes:
            inside = own >= 0
            if np.any(inside):
                own[np.flatnonzero(inside)[veto.contains(ra[inside], dec[inside])]] = -1
        return own

    def contains(self, ra_deg, dec_deg):
        return self.owner(ra_deg, dec_deg) >= 0

    def completeness(self, ra_deg, dec_deg):
        ra, dec = _as_angles(ra_deg, dec_deg)
        own = self.owner(ra, dec)
        out = np.zeros(ra.shape)
        for i, part in enumerate(self.parts):
            sel = own == i
            if np.any(sel):
                out[sel] = part.completeness(ra[sel], dec[sel])
        return out

    @functools.cached_property
    def _kept(self) -> np.ndarray:
        """Per part: fraction of its area kept, its error, and the kept mean completeness."""
        rng = np.random.default_rng(5_550_211)
        out = np.zeros((len(self.parts), 3))
        for i, part in enumerate(self.parts):
            ra, dec = _uniform_sample(part, self.area_samples, rng)
            mine = self.owner(ra, dec) == i
            f = mine.mean()
            comp = np.where(mine, part.completeness(ra, dec), 0.0).mean()
            out[i] = f, np.sqrt(f * (1 - f) / ra.size), comp
        return out

    def area_sr(self) -> float:
        return float(sum(p.area_sr() * k[0] for p, k in zip(self.parts, self._kept)))

    def area_error_sr(self) -> float:
        """One-sigma sampling error of :meth:`area_sr`, sr."""
        return float(np.sqrt(sum((p.area_sr() * k[1]) ** 2
                                 for p, k in zip(self.parts, self._kept))))

    def effective_area_sr(self) -> float:
        """Kept area, completeness-weighted inside field tables (their random density follows
        completeness; the other parts are sampled uniformly), sr."""
        return float(sum(p.area_sr() * (k[2] if isinstance(p, FieldFootprint) else k[0])
                         for p, k in zip(self.parts, self._kept)))

    def sample(self, n, rng):
        """Directions uniform inside box/HEALPix parts and proportional to completeness inside
        field tables (degrees).

        Each part proposes points with its own density, chosen in proportion to its own
        (effective) area, and keeps those it owns: the density is then the same constant
        (times completeness in field tables) everywhere in the union.
        """
        own_weight = np.array([p.effective_area_sr() if isinstance(p, FieldFootprint)
                               else p.area_sr() for p in self.parts])
        if not self.effective_area_sr() > 0:
            raise InputError("the footprint union is empty (every part is vetoed or covered)")
        prob = own_weight / own_weight.sum()
        out_ra, out_dec, have, tries = [], [], 0, 0
        while have < n:
            m = max(1024, int(1.3 * (n - have)) + 16)
            which = rng.choice(len(self.parts), size=m, p=prob)
            ra, dec = np.empty(m), np.empty(m)
            for i, part in enumerate(self.parts):
                sel = which == i
                if np.any(sel):
                    ra[sel], dec[sel] = part.sample(int(sel.sum()), rng)
            keep = self.owner(ra, dec) == which
            out_ra.append(ra[keep])
            out_dec.append(dec[keep])
            have += int(keep.sum())
            tries += 1
            if tries > 1000:
                raise InputError("could not draw points inside the footprint union")
        return np.concatenate(out_ra)[:n], np.concatenate(out_dec)[:n]
