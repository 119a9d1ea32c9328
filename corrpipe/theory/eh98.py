"""Scalar fitting formulae of Eisenstein & Hu (1998): equality, drag epoch, sound horizon, Silk scale.

All physical densities are ``omega_x_h2 = Omega_x h^2``; wavenumbers are in 1/Mpc and lengths
in Mpc (no factors of h). ``T_cmb`` is the CMB temperature today in kelvin.

Notes
-----
Eisenstein, D. J. & Hu, W. 1998, ApJ 496, 605, "Baryonic features in the matter transfer
function", eqs. 2-7 and 26 (equation numbers from memory, see the project's REFERENCES §1).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "z_equality",
    "k_equality",
    "drag_redshift",
    "baryon_ratio",
    "sound_horizon_eq6",
    "sound_horizon_fit",
    "silk_scale",
]

_T_CMB_DEFAULT = 2.7255


def _theta(T_cmb: float) -> float:
    if not np.isfinite(T_cmb) or T_cmb <= 0:
        raise ValueError(f"T_cmb must be a positive temperature in K, got {T_cmb!r}")
    return T_cmb / 2.7


def _check_density(name: str, value: float) -> None:
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a positive physical density Omega h^2, got {value!r}")


def z_equality(omega_m_h2: float, T_cmb: float = _T_CMB_DEFAULT) -> float:
    """Redshift of matter-radiation equality.

    Parameters
    ----------
    omega_m_h2 : float
        Physical matter density Omega_m h^2.
    T_cmb : float
        CMB temperature today, K.

    Returns
    -------
    float
        z_eq (EH98 note that the fit really gives 1 + z_eq; we follow the paper and return it
        as z_eq).

    Notes
    -----
    Eisenstein & Hu 1998, eq. 2: z_eq = 2.50e4 omega_m Theta^-4, Theta = T_cmb / 2.7 K.
    """
    _check_density("omega_m_h2", omega_m_h2)
    return 2.50e4 * omega_m_h2 * _theta(T_cmb) ** -4


def k_equality(omega_m_h2: float, T_cmb: float = _T_CMB_DEFAULT) -> float:
    """Wavenumber of the horizon scale at equality, 1/Mpc.

    Parameters
    ----------
    omega_m_h2 : float
        Physical matter density Omega_m h^2.
    T_cmb : float
        CMB temperature today, K.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 3: k_eq = 7.46e-2 omega_m Theta^-2 Mpc^-1.
    """
    _check_density("omega_m_h2", omega_m_h2)
    return 7.46e-2 * omega_m_h2 * _theta(T_cmb) ** -2


def drag_redshift(omega_m_h2: float, omega_b_h2: float) -> float:
    """Redshift of the baryon drag epoch (fitting formula).

    Parameters
    ----------
    omega_m_h2, omega_b_h2 : float
        Physical matter and baryon densities Omega h^2.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 4:
    z_d = 1291 w_m^0.251 / (1 + 0.659 w_m^0.828) [1 + b1 w_b^b2],
    b1 = 0.313 w_m^-0.419 [1 + 0.607 w_m^0.674], b2 = 0.238 w_m^0.223.
    The fit sits about 40 below the drag redshift of Boltzmann codes (about 1021 against
    1060 for a Planck 2018 cosmology), which is the main reason EH98 sound horizons are
    about 2.7 % larger.
    """
    _check_density("omega_m_h2", omega_m_h2)
    _check_density("omega_b_h2", omega_b_h2)
    wm, wb = omega_m_h2, omega_b_h2
    b1 = 0.313 * wm**-0.419 * (1.0 + 0.607 * wm**0.674)
    b2 = 0.238 * wm**0.223
    return 1291.0 * wm**0.251 / (1.0 + 0.659 * wm**0.828) * (1.0 + b1 * wb**b2)


def baryon_ratio(z, omega_b_h2: float, T_cmb: float = _T_CMB_DEFAULT):
    """Baryon-to-photon momentum density ratio R = 3 rho_b / (4 rho_gamma) at redshift z.

    Parameters
    ----------
    z : float or array_like
        Redshift.
    omega_b_h2 : float
        Physical baryon density Omega_b h^2.
    T_cmb : float
        CMB temperature today, K.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 5: R = 31.5 omega_b Theta^-4 (z / 10^3)^-1.
    """
    _check_density("omega_b_h2", omega_b_h2)
    z = np.asarray(z, dtype=float)
    out = 31.5 * omega_b_h2 * _theta(T_cmb) ** -4 * (z / 1.0e3) ** -1
    return float(out) if out.ndim == 0 else out


def sound_horizon_eq6(omega_m_h2: float, omega_b_h2: float, T_cmb: float = _T_CMB_DEFAULT) -> float:
    """Comoving sound horizon at the drag epoch from the closed form, Mpc.

    Parameters
    ----------
    omega_m_h2, omega_b_h2 : float
        Physical matter and baryon densities Omega h^2.
    T_cmb : float
        CMB temperature today, K.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 6:
    s = 2/(3 k_eq) sqrt(6/R_eq) ln[(sqrt(1+R_d) + sqrt(R_d+R_eq)) / (1 + sqrt(R_eq))],
    with z_d from eq. 4, z_eq from eq. 2 and R from eq. 5.
    """
    k_eq = k_equality(omega_m_h2, T_cmb)
    z_eq = z_equality(omega_m_h2, T_cmb)
    z_d = drag_redshift(omega_m_h2, omega_b_h2)
    r_eq = baryon_ratio(z_eq, omega_b_h2, T_cmb)
    r_d = baryon_ratio(z_d, omega_b_h2, T_cmb)
    return float(
        2.0 / (3.0 * k_eq) * np.sqrt(6.0 / r_eq)
        * np.log((np.sqrt(1.0 + r_d) + np.sqrt(r_d + r_eq)) / (1.0 + np.sqrt(r_eq)))
    )


def sound_horizon_fit(omega_m_h2: float, omega_b_h2: float) -> float:
    """Approximate sound horizon at the drag epoch, Mpc.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 26: s = 44.5 ln(9.83 / w_m) / sqrt(1 + 10 w_b^(3/4)) Mpc.
    """
    _check_density("omega_m_h2", omega_m_h2)
    _check_density("omega_b_h2", omega_b_h2)
    return float(44.5 * np.log(9.83 / omega_m_h2) / np.sqrt(1.0 + 10.0 * omega_b_h2**0.75))


def silk_scale(omega_m_h2: float, omega_b_h2: float) -> float:
    """Silk damping wavenumber, 1/Mpc.

    Notes
    -----
    Eisenstein & Hu 1998, eq. 7:
    k_Silk = 1.6 w_b^0.52 w_m^0.73 [1 + (10.4 w_m)^-0.95] Mpc^-1.
    """
    _check_density("omega_m_h2", omega_m_h2)
    _check_density("omega_b_h2", omega_b_h2)
    return float(
        1.6 * omega_b_h2**0.52 * omega_m_h2**0.73 * (1.0 + (10.4 * omega_m_h2) ** -0.95)
    )
