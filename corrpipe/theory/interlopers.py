"""Line interlopers: the redshift a misidentified emission line is given, and the stretch of
its clustering between its true frame and the frame it is assigned to.

An object whose line of rest wavelength lambda_i is read as the target line lambda_t is seen
at the same observed wavelength, so it is assigned

    1 + z_assigned = (1 + z_true) lambda_i / lambda_t.

Small separations around it map from its true comoving frame to the assigned one by

    gamma_perp = D_M(z_assigned) / D_M(z_true),
    gamma_par  = [(1 + z_assigned) D_H(z_assigned)] / [(1 + z_true) D_H(z_true)],

(transverse: the same angle at two distances; radial: d chi = D_H dz and
dz_assigned / dz_true = lambda_i / lambda_t), so the interlopers' own correlation function
appears in the target frame as xi_true(s_par / gamma_par, s_perp / gamma_perp).

Rest wavelengths are in Angstrom, in vacuum unless a medium says otherwise; the named lines
carry vacuum values.

Notes
-----
Mapping derived in REFERENCES §15 (geometry only); the interloper xi contribution follows
Pullen et al. 2016, MNRAS 455, 4301 and Grasshorn Gebhardt et al. 2019, ApJ 876, 32 [both from
memory]. Vacuum rest wavelengths: standard atomic data [from memory; common practice].
Air-to-vacuum conversion: the refractive index of standard air of Morton 2000, ApJS 130, 403
(after Ciddor 1996) [coefficients from memory].
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np

from corrpipe.errors import InputError

__all__ = ["REST_WAVELENGTHS", "LINE_ALIASES", "rest_wavelength", "air_to_vacuum",
           "vacuum_to_air", "assigned_redshift", "true_redshift", "LineMapping",
           "line_mapping", "Z_TRUE_MAX"]

#: Vacuum rest wavelengths in Angstrom of common survey lines [from memory; standard atomic
#: data, REFERENCES §15]. "OII" is the mean of the unresolved 3727.09 / 3729.88 doublet.
REST_WAVELENGTHS: dict[str, float] = {
    "Lya": 1215.67,
    "OII": 3728.485,
    "Hb": 4862.68,
    "OIII4959": 4960.30,
    "OIII5007": 5008.24,
    "Ha": 6564.61,
}

#: Other spellings accepted for the named lines (compared case-insensitively with brackets,
#: spaces, hyphens and underscores removed).
LINE_ALIASES: dict[str, str] = {
    "lyalpha": "Lya", "lymanalpha": "Lya", "lya1216": "Lya",
    "oii3727": "OII", "oii3728": "OII", "oiidoublet": "OII",
    "hbeta": "Hb", "hb4861": "Hb", "hb4863": "Hb",
    "oiii4960": "OIII4959", "oiii5008": "OIII5007",
    "halpha": "Ha", "ha6563": "Ha", "ha6565": "Ha",
}

_MEDIA = ("vacuum", "air")


def _key(name: str) -> str:
    return re.sub(r"[\[\]\s\-_]", "", name).lower()


def rest_wavelength(line: Any, medium: str = "vacuum") -> float:
    """Vacuum rest wavelength (Angstrom) of a named line or of a given number.

    Parameters
    ----------
    line : str or float
        A name of :data:`REST_WAVELENGTHS` (or an alias of :data:`LINE_ALIASES`), or the
        wavelength itself in Angstrom.
    medium : {"vacuum", "air"}
        Medium a *number* is given in; air wavelengths are converted to vacuum. Named lines
        are always vacuum values.

    Raises
    ------
    InputError
        Unknown name (with the known ones listed), non-positive number, unknown medium.
    """
    if medium not in _MEDIA:
        raise InputError(f"line medium must be one of {_MEDIA}, got {medium!r}")
    if isinstance(line, str):
        key = _key(line)
        names = {_key(n): n for n in REST_WAVELENGTHS}
        if key in names:
            return REST_WAVELENGTHS[names[key]]
        if key in LINE_ALIASES:
            return REST_WAVELENGTHS[LINE_ALIASES[key]]
        try:
            line = float(line)
        except ValueError:
            raise InputError(f"unknown emission line {line!r}; known lines are "
                             f"{', '.join(REST_WAVELENGTHS)} (or give the rest wavelength "
                             "in Angstrom)") from None
    wavelength = float(line)
    if not np.isfinite(wavelength) or wavelength <= 0:
        raise InputError(f"a rest wavelength must be a positive number of Angstrom, got {line!r}")
    return air_to_vacuum(wavelength) if medium == "air" else wavelength


def _air_index(sigma2):
    # Morton 2000 eq. 8 (after Ciddor 1996), sigma = 1e4 / lambda_vac in 1/micron [from memory]
    return 1.0 + 8.34254e-5 + 2.406147e-2 / (130.0 - sigma2) + 1.5998e-4 / (38.9 - sigma2)


def vacuum_to_air(wavelength):
    """Air wavelength (Angstrom) of a vacuum wavelength above 2000 Angstrom (Morton 2000)."""
    lam = np.asarray(wavelength, dtype=float)
    return lam / _air_index((1e4 / lam) ** 2)


def air_to_vacuum(wavelength):
    """Vacuum wavelength (Angstrom) of an air wavelength above 2000 Angstrom.

    Inverts :func:`vacuum_to_air` by fixed-point iteration (converges to 1e-12 relative in a
    few steps, since the index varies slowly with wavelength). Below 2000 Angstrom the value
    is returned unchanged (air wavelengths are not used there; common practice).
    """
    lam_air = np.asarray(wavelength, dtype=float)
    lam = lam_air.copy()
    for _ in range(8):
        lam = lam_air * _air_index((1e4 / lam) ** 2)
    out = np.where(lam_air >= 2000.0, lam, lam_air)
    return float(out) if out.ndim == 0 else out


def assigned_redshift(z_true, lambda_interloper: float, lambda_target: float):
    """Redshift an interloper at ``z_true`` is given when its line is read as the target line.

    1 + z_assigned = (1 + z_true) lambda_interloper / lambda_target (same observed wavelength).
    """
    return (1.0 + np.asarray(z_true, dtype=float)) * (lambda_interloper / lambda_target) - 1.0


def true_redshift(z_assigned, lambda_interloper: float, lambda_target: float):
    """True redshift of an interloper assigned ``z_assigned`` (inverse of
    :func:`assigned_redshift`); below 0 when no interloper can land there."""
    return (1.0 + np.asarray(z_assigned, dtype=float)) * (lambda_target / lambda_interloper) - 1.0


@dataclass(frozen=True)
class LineMapping:
    """Where interlopers of one line land in a target sample, and how they are stretched.

    Attributes
    ----------
    target_wavelength, interloper_wavelength : float
        Vacuum rest wavelengths, Angstrom.
    z_assigned, z_true : ndarray
        Assigned (target-line) and true redshifts.
    gamma_perp, gamma_par : ndarray
        Transverse and line-of-sight stretch from the true to the assigned comoving frame.
    """

    target_wavelength: float
    interloper_wavelength: float
    z_assigned: np.ndarray
    z_true: np.ndarray
    gamma_perp: np.ndarray
    gamma_par: np.ndarray

    def as_dict(self) -> dict:
        """Plain JSON-ready dict (arrays become lists, scalars floats)."""
        out = {}
        for k, v in self.__dict__.items():
            a = np.asarray(v)
            out[k] = float(a) if a.ndim == 0 else a.tolist()
        return out


#: Highest true redshift an interloper may have (the distance tables and growth solutions
#: are made for z <= 10).
Z_TRUE_MAX = 10.0


def line_mapping(cosmology, target_line: Any, interloper_line: Any, z_assigned, *,
                 medium: str = "vacuum") -> LineMapping:
    """Assigned-to-true redshift and stretch factors of one interloper line.

    Parameters
    ----------
    cosmology : corrpipe.cosmology.Cosmology
        Cosmology of the distances (the analysis' fiducial one for a fit).
    target_line, interloper_line : str or float
        Line names or rest wavelengths in Angstrom (see :func:`rest_wavelength`).
    z_assigned : float or array_like
        Redshift(s) in the target sample, i.e. as assigned.
    medium : {"vacuum", "air"}
        Medium of wavelengths given as numbers.

    Returns
    -------
    LineMapping

    Raises
    ------
    InputError
        Same line twice, or an assigned redshift that no interloper of this line can have
        (a line redder than the target lands only at z_assigned > lambda_i / lambda_t - 1;
        below that its true redshift would be <= 0; a much bluer line needs a true redshift
        above :data:`Z_TRUE_MAX`).
    """
    lam_t = rest_wavelength(target_line, medium)
    lam_i = rest_wavelength(interloper_line, medium)
    if abs(lam_i - lam_t) < 1e-9 * lam_t:
        raise InputError(f"interloper line {interloper_line!r} has the target line's rest "
                         f"wavelength ({lam_t:g} A); an interloper must be another line")
    z_a = np.asarray(z_assigned, dtype=float)
    z_i = true_redshift(z_a, lam_i, lam_t)
    if not np.all(np.isfinite(z_a)) or np.any(z_a <= 0) or np.any(z_i <= 0):
        z_lowest = lam_i / lam_t - 1.0
        raise InputError(
            f"interloper line {interloper_line!r} ({lam_i:g} A) read as {target_line!r} "
            f"({lam_t:g} A) cannot be assigned z = {np.min(z_a):g}: it would need a true "
            f"redshift {np.min(z_i):.4g} <= 0 (it lands only at z_assigned > {max(z_lowest, 0):.4g}); "
            "drop this line or restrict the target redshift range")
    if np.any(z_i > Z_TRUE_MAX):
        raise InputError(
            f"interloper line {interloper_line!r} ({lam_i:g} A) read as {target_line!r} "
            f"({lam_t:g} A) at z = {np.max(z_a):g} would sit at true redshift "
            f"{np.max(z_i):.4g}, above {Z_TRUE_MAX:g} (no valid redshift in range); drop this "
            "line or restrict the target redshift range")
    z_t = z_a
    dm_t = cosmology.transverse_distance(z_t)
    dm_i = cosmology.transverse_distance(z_i)
    gamma_perp = dm_t / dm_i
    gamma_par = ((1.0 + z_t) * cosmology.hubble_distance(z_t)) / \
        ((1.0 + z_i) * cosmology.hubble_distance(z_i))
    return LineMapping(target_wavelength=lam_t, interloper_wavelength=lam_i,
                       z_assigned=z_t, z_true=z_i, gamma_perp=np.asarray(gamma_perp),
                       gamma_par=np.asarray(gamma_par))
