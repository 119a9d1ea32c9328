"""The dilation a survey mock carries: expected alpha_par, alpha_perp, alpha_iso.

An analysis in a fiducial cosmology measures (Xu et al. 2013; REFERENCES sec. 7)

    alpha_par  = [D_H / r_d]_true / [D_H / r_d]_fid,
    alpha_perp = [D_M / r_d]_true / [D_M / r_d]_fid,
    alpha_iso  = [D_V / r_d]_true / [D_V / r_d]_fid = alpha_par^(1/3) alpha_perp^(2/3).

Distances come from :mod:`astropy.cosmology` (through :meth:`Cosmology.astropy`) in Mpc, and
each cosmology's own sound horizon r_d in Mpc, so the ratio is free of h.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from corrpipe.errors import InputError

__all__ = ["Dilation", "expected_dilation"]

_C_KM_S = 299792.458


@dataclass(frozen=True)
class Dilation:
    """Expected dilation parameters at one effective redshift.

    Attributes
    ----------
    alpha_par, alpha_perp, alpha_iso : float
        Line-of-sight, transverse and isotropic dilations (true over fiducial).
    z_eff : float
        Redshift they are evaluated at.
    DH_over_rd, DM_over_rd, DV_over_rd : float
        The true cosmology's distance ratios at z_eff (for the report).
    """

    alpha_par: float
    alpha_perp: float
    alpha_iso: float
    z_eff: float
    DH_over_rd: float = float("nan")
    DM_over_rd: float = float("nan")
    DV_over_rd: float = float("nan")

    def as_dict(self) -> dict:
        """Plain dict of the fields (for JSON and file metadata)."""
        return {k: float(v) for k, v in self.__dict__.items()}


def _ratios(cosmology, z: float) -> tuple[float, float, float]:
    model = cosmology.astropy()
    r_d = float(cosmology.sound_horizon())
    d_h = _C_KM_S / float(model.H(z).to_value("km / (Mpc s)"))
    d_m = float(model.comoving_transverse_distance(z).to_value("Mpc"))
    d_v = float(np.cbrt(z * d_m**2 * d_h))
    return d_h / r_d, d_m / r_d, d_v / r_d


def expected_dilation(true_cosmology, fiducial_cosmology, z_eff: float) -> Dilation:
    """Dilation an analysis in ``fiducial_cosmology`` should find for data in ``true_cosmology``.

    Parameters
    ----------
    true_cosmology, fiducial_cosmology : corrpipe.cosmology.Cosmology
        The cosmology the mock was made in, and the one the analysis assumes.
    z_eff : float
        Effective redshift of the sample (> 0).

    Returns
    -------
    Dilation

    Notes
    -----
    Definitions of Xu et al. 2013, MNRAS 431, 2834 and Anderson et al. 2014, MNRAS 441, 24
    [from memory; REFERENCES sec. 7]; D_V of Eisenstein et al. 2005, ApJ 633, 560.
    """
    z = float(z_eff)
    if not np.isfinite(z) or z <= 0:
        raise InputError(f"effective redshift must be > 0, got {z_eff!r}")
    h_t, m_t, v_t = _ratios(true_cosmology, z)
    h_f, m_f, v_f = _ratios(fiducial_cosmology, z)
    return Dilation(alpha_par=h_t / h_f, alpha_perp=m_t / m_f, alpha_iso=v_t / v_f, z_eff=z,
                    DH_over_rd=h_t, DM_over_rd=m_t, DV_over_rd=v_t)
