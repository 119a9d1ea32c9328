"""The ``[mock]`` config table: what mock catalogues to write and how to make them."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np

from corrpipe.errors import ConfigError, InputError
from corrpipe.settings import setting
from corrpipe.theory.interlopers import line_mapping, rest_wavelength

__all__ = ["MockSettings", "MIN_NYQUIST_K", "InterloperPopulation", "populations_of"]

#: Smallest Nyquist wavenumber (h/Mpc) a mock mesh may have: BAO fits use modes up to
#: k ~ 0.2-0.3 h/Mpc and separations down to ~30 Mpc/h (common practice).
MIN_NYQUIST_K = 0.2


@dataclass(frozen=True)
class MockSettings:
    """Config table ``[mock]`` for the mock-writing command.

    Box mode writes periodic boxes (columns x, y, z in Mpc/h, redshift-space along
    ``los_axis``); survey mode carves a sky catalogue (RA, DEC, Z, WEIGHT) out of each box
    and, if ``randoms_factor`` > 0, a matching random catalogue. The mock is made in the *true*
    cosmology (``true_preset`` plus overrides); the expected dilation against the fiducial
    ``[cosmology]`` is written beside each catalogue.
    """

    kind: str = setting("zeldovich", "generator: zeldovich (1LPT, BAO damped by bulk flows) or "
                        "lognormal (Coles & Jones 1991)", choices=("zeldovich", "lognormal"))
    geometry: str = setting("box", "write periodic boxes or carve sky surveys",
                            choices=("box", "survey"))
    n_mocks: int = setting(1, "number of mocks (seeds seed, seed + 1, ...)", low=1, high=100000)
    seed: int = setting(1, "seed of the first mock", low=0)
    box_size: float = setting(1000.0, "side of the periodic box", unit="Mpc/h", low=0.0,
                              low_open=True, high=20000.0)
    n_mesh: int = setting(256, "mesh nodes per box side (cell = box_size / n_mesh)", low=8,
                          high=2048)
    nbar: float = setting(3e-4, "mean number density of the box", unit="(h/Mpc)^3", low=0.0,
                          low_open=True, high=1.0)
    bias: float = setting(2.0, "linear (Eulerian) galaxy bias", low=0.0, low_open=True,
                          high=10.0)
    redshift: float = setting(0.5, "redshift of the box: linear P(k) and growth rate",
                              low=0.0, high=10.0)
    growth_rate: float | None = setting(None, "linear growth rate f (empty: from the true "
                                        "cosmology at the box redshift)", low=0.0, high=3.0)
    rsd: bool = setting(True, "apply linear redshift-space distortions")
    power_file: str | None = setting(None, "table of the linear P(k) at the box redshift, "
                                     "columns k [h/Mpc] and P [(Mpc/h)^3] (empty: EH98)",
                                     path=True)
    true_preset: str = setting("planck2018", "named cosmology the mock is made in")
    true_h: float | None = setting(None, "override of h for the true cosmology", low=0.2,
                                   high=1.5)
    true_omega_m: float | None = setting(None, "override of Omega_m for the true cosmology",
                                         low=0.0, high=1.5, low_open=True)
    true_omega_b: float | None = setting(None, "override of Omega_b for the true cosmology",
                                         low=0.0, high=0.5, low_open=True)
    true_sigma8: float | None = setting(None, "override of sigma8 for the true cosmology",
                                        low=0.0, high=2.0, low_open=True)
    true_w0: float | None = setting(None, "override of w0 for the true cosmology", low=-3.0,
                                    high=0.0)
    alpha_par: float = setting(1.0, "box mode: injected line-of-sight dilation", low=0.5,
                               high=2.0)
    alpha_perp: float = setting(1.0, "box mode: injected transverse dilation", low=0.5,
                                high=2.0)
    los_axis: str = setting("z", "box mode: line-of-sight axis", choices=("x", "y", "z"))
    bias_smoothing: float = setting(0.0, "zeldovich: smoothing of the field that sets the "
                                    "Lagrangian selection weights", unit="Mpc/h", low=0.0,
                                    high=100.0)
    lagrangian_positions: str = setting(
        "nodes", "zeldovich: galaxies start on the mesh nodes, or at uniform positions inside "
        "the cells with the displacement read there (no lattice in the pair counts; use when "
        "the displacements are small against the cell, e.g. at high redshift)",
        choices=("nodes", "cells"))
    precision: str = setting("float64", "mesh precision (float32 halves memory)",
                             choices=("float64", "float32"))
    observer: tuple[float, float, float] = setting((0.0, 0.0, 0.0), "survey mode: observer "
                                                   "position in the box frame", unit="Mpc/h")
    z_min: float = setting(0.15, "survey mode: lowest observed redshift", low=0.0)
    z_max: float = setting(0.3, "survey mode: highest observed redshift (exclusive; the "
                           "default shell fits the default box seen from its corner)",
                           low=0.0, low_open=True, high=10.0)
    footprint: tuple[tuple[float, float, float, float], ...] = setting(
        ((10.0, 80.0, 5.0, 45.0),), "survey mode: RA/Dec boxes "
                               "[ra_min, ra_max, dec_min, dec_max] in degrees (union)")
    nz_redshifts: tuple[float, ...] = setting((), "survey mode: redshift nodes of the target "
                                              "n(z) (empty: constant nbar)")
    nz_densities: tuple[float, ...] = setting((), "survey mode: n(z) at those nodes",
                                              unit="(h/Mpc)^3", low=0.0)
    replicate: bool = setting(False, "survey mode: tile the periodic box if the survey "
                              "reaches beyond it")
    randoms_factor: float = setting(10.0, "survey mode: randoms per data object (0: none)",
                                    low=0.0, high=1000.0)
    target_line: str = setting("", "with interlopers: the line the redshifts assume "
                               "(name such as OIII5007 or rest wavelength in Angstrom)")
    line_medium: str = setting("vacuum", "medium of rest wavelengths given as numbers",
                               choices=("vacuum", "air"))
    interlopers: tuple[dict[str, Any], ...] = setting(
        (), "box mode: line-interloper populations, [[mock.interlopers]] tables with line, "
        "fraction (share of the sample, in [0, 1)) and bias (at the line's true redshift)")
    format: str = setting("fits", "output file format", choices=("fits", "hdf5"))
    name: str = setting("mock", "file name prefix of the written catalogues")

    def __post_init__(self) -> None:
        # TOML tables arrive as read-only mappings; keep plain dicts (copyable, JSON-ready)
        object.__setattr__(self, "interlopers",
                           tuple(dict(e) if isinstance(e, Mapping) else e
                                 for e in self.interlopers))

    def validate(self) -> None:
        """Cross-field checks."""
        if self.geometry == "survey":
            if self.z_min >= self.z_max:
                raise ConfigError(f"mock: z_min = {self.z_min} must be below z_max = "
                                  f"{self.z_max}")
            if len(self.nz_redshifts) != len(self.nz_densities):
                raise ConfigError(f"mock: nz_redshifts has {len(self.nz_redshifts)} entries but "
                                  f"nz_densities has {len(self.nz_densities)}; give one density "
                                  "per redshift node")
            if len(self.nz_redshifts) == 1:
                raise ConfigError("mock: an n(z) table needs at least two nodes")
            if len(self.footprint) == 0:
                raise ConfigError("mock: footprint needs at least one RA/Dec box")
            for i, box in enumerate(self.footprint):
                if len(box) != 4:
                    raise ConfigError(f"mock: footprint[{i}] = {list(box)} must have four "
                                      "numbers [ra_min, ra_max, dec_min, dec_max] (degrees)")
            if self.alpha_par != 1.0 or self.alpha_perp != 1.0:
                raise ConfigError("mock: alpha_par/alpha_perp stretch boxes only; in survey "
                                  "mode inject a dilation through the true_* cosmology keys")
            if len(self.observer) != 3:
                raise ConfigError(f"mock: observer must be three numbers (x, y, z in Mpc/h); "
                                  f"got {list(self.observer)}")
        if self.interlopers:
            from corrpipe.cosmology import preset

            z_range = (self.redshift if self.geometry == "box" else
                       (self.z_min, self.z_max, self.redshift))
            pops = populations_of(self.interlopers, self.target_line, z_range,
                                  preset(self.true_preset), self.line_medium)
            if self.geometry == "box" and any(p.fraction_z for p in pops):
                raise ConfigError("mock: a fraction that varies with redshift (fraction_z) "
                                  "needs survey mocks (geometry = \"survey\"); a box has one "
                                  "redshift")
        if self.n_mesh % 2:
            raise ConfigError(f"mock: n_mesh = {self.n_mesh} must be even (FFT layout)")
        k_nyquist = math.pi * self.n_mesh / self.box_size
        if k_nyquist < MIN_NYQUIST_K:
            need = math.ceil(MIN_NYQUIST_K * self.box_size / math.pi)
            need += need % 2
            raise ConfigError(f"mock: n_mesh = {self.n_mesh} is too coarse for box_size = "
                              f"{self.box_size:g} Mpc/h (cells of "
                              f"{self.box_size / self.n_mesh:.1f} Mpc/h, Nyquist "
                              f"{k_nyquist:.3f} h/Mpc < {MIN_NYQUIST_K}); use n_mesh >= {need}")


_KEYS = ("line", "fraction", "bias")
_OPTIONAL = ("fraction_z",)


@dataclass(frozen=True)
class InterloperPopulation:
    """One interloper population of a mock.

    Attributes
    ----------
    line : str
        Its line (name or rest wavelength in Angstrom).
    fraction : tuple of float
        Its share of the final (mixed) sample, in [0, 1): one value (constant), or one value
        per node of ``fraction_z``.
    bias : float
        Its linear bias at its true redshift.
    fraction_z : tuple of float
        Assigned-redshift nodes of a redshift-dependent fraction (linear in between, constant
        beyond the end nodes); empty for a constant fraction.
    """

    line: str
    fraction: tuple
    bias: float
    fraction_z: tuple = ()

    def fraction_at(self, z_assigned) -> np.ndarray:
        """Fraction at assigned redshift(s)."""
        z = np.asarray(z_assigned, dtype=float)
        if not self.fraction_z:
            return np.full(z.shape, float(self.fraction[0]))
        return np.interp(z, self.fraction_z, self.fraction)

    @property
    def max_fraction(self) -> float:
        """Largest fraction over redshift."""
        return float(max(self.fraction))


def _numbers(value, label: str, what: str) -> tuple:
    values = value if isinstance(value, (list, tuple)) else [value]
    try:
        out = tuple(float(v) for v in values)
    except (TypeError, ValueError):
        raise ConfigError(f"{label}: {what} must be a number or a list of numbers, got "
                          f"{value!r}") from None
    if not out or not all(np.isfinite(out)):
        raise ConfigError(f"{label}: {what} must be finite numbers, got {value!r}")
    return out


def populations_of(entries, target_line: str, z_range, cosmology,
                   medium: str = "vacuum", where: str = "mock.interlopers") -> tuple:
    """Validate ``[[mock.interlopers]]`` tables into populations.

    Parameters
    ----------
    entries : sequence of mappings
        Tables with ``line``, ``fraction`` (a number, or a list matched to ``fraction_z``),
        ``bias`` and optionally ``fraction_z`` (assigned-redshift nodes).
    target_line : str
        The target line.
    z_range : float or (float, float)
        Assigned redshift(s) the interlopers must reach (the box redshift, or a survey's
        z_min and z_max).
    cosmology : corrpipe.cosmology.Cosmology
        For the mapping check.

    Raises
    ------
    ConfigError
        Missing or unknown keys, a fraction outside [0, 1) or fractions summing to 1 or more,
        a non-positive bias, an unknown line name, or a line that cannot be read as the target
        line in the redshift range.
    """
    out = []
    if entries and not target_line:
        raise ConfigError(f"{where}: interloper populations need mock.target_line (the line "
                          "the sample's redshifts assume, e.g. \"OIII5007\")")
    z_check = np.atleast_1d(np.asarray(z_range, dtype=float))
    for i, entry in enumerate(entries):
        label = f"{where}[{i}]"
        entry = dict(entry) if isinstance(entry, Mapping) else entry
        if not isinstance(entry, dict):
            raise ConfigError(f"{label}: expected a table {{line, fraction, bias}}, got "
                              f"{entry!r}")
        unknown = sorted(set(entry) - set(_KEYS) - set(_OPTIONAL))
        missing = [k for k in _KEYS if k not in entry]
        if unknown or missing:
            raise ConfigError(f"{label}: keys must be {list(_KEYS)} (and optionally "
                              f"{list(_OPTIONAL)}); "
                              + (f"unknown {unknown}" if unknown else f"missing {missing}"))
        line = entry["line"]
        fraction = _numbers(entry["fraction"], label, "fraction")
        bias = _numbers(entry["bias"], label, "bias")
        if len(bias) != 1:
            raise ConfigError(f"{label}: bias must be one number, got {entry['bias']!r}")
        bias = bias[0]
        nodes = _numbers(entry["fraction_z"], label, "fraction_z") if "fraction_z" in entry \
            else ()
        for f in fraction:
            if not (0.0 <= f < 1.0):
                raise ConfigError(f"{label}: fraction = {f:g} must lie in [0, 1) (a share of "
                                  "the sample, e.g. 0.05)")
        if nodes and (len(nodes) != len(fraction) or len(nodes) < 2 or
                      np.any(np.diff(nodes) <= 0)):
            raise ConfigError(f"{label}: fraction_z needs at least two increasing redshifts, "
                              f"one per fraction value; got fraction_z = {list(nodes)} and "
                              f"fraction = {list(fraction)}")
        if not nodes and len(fraction) != 1:
            raise ConfigError(f"{label}: a list of fractions needs fraction_z (the assigned "
                              "redshifts they hold at)")
        if not (bias > 0):
            raise ConfigError(f"{label}: bias = {bias:g} must be a positive linear bias")
        try:
            rest_wavelength(str(line), medium)
            line_mapping(cosmology, target_line, str(line), z_check, medium=medium)
        except InputError as exc:
            raise ConfigError(f"{label}: {exc}") from None
        out.append(InterloperPopulation(str(line), fraction, bias, nodes))
    if out:
        nodes = np.unique(np.concatenate([z_check] + [np.asarray(p.fraction_z, float)
                                                      for p in out]))
        total = np.sum([p.fraction_at(nodes) for p in out], axis=0)
        if np.max(total) >= 1.0:
            raise ConfigError(f"{where}: the interloper fractions add up to "
                              f"{float(np.max(total)):g}; they must sum to less than 1")
    return tuple(out)
