"""BAO damping scales from the linear power spectrum (Zel'dovich displacements).

The acoustic feature is smeared by the Lagrangian displacements of pairs. In the Zel'dovich
approximation the variance of the separation change of a distant pair along one axis is

    Sigma_perp^2 = (1 / 3 pi^2) * integral P_lin(k, z) dk,

twice the one-axis displacement variance (Crocce & Scoccimarro 2008, PRD 77, 023533, the
propagator exp(-k^2 sigma_v^2 / 2) with sigma_v^2 = int P dk / 6 pi^2, squared for the power
[from memory]); along the line of sight redshift-space distortions multiply the displacement by
1 + f, so Sigma_par = (1 + f) Sigma_perp (Eisenstein, Seo & White 2007, ApJ 664, 675
[from memory], REFERENCES §12: Sigma_perp = Sigma_0 D(z), Sigma_par = Sigma_0 D(z) (1 + f)).
Both therefore shrink with the growth factor and scale with sigma8. After reconstruction with
a Gaussian smoothing S(k) = exp(-k^2 R^2 / 2), the large-scale displacements are removed and
the residual is weighted by [1 - S(k)]^2 (the Zel'dovich picture of reconstruction,
Padmanabhan, White & Cohn 2009, PRD 79, 063523 [from memory]); this ignores the shot noise of
the density field and the smearing of the shifted randoms, so it is a lower bound on what a
noisy reconstruction leaves.
"""

from __future__ import annotations

import numpy as np
from scipy.integrate import trapezoid

from corrpipe.errors import InputError
from corrpipe.theory.linear_power import LinearPower

__all__ = ["zeldovich_damping"]


def zeldovich_damping(linear_power: LinearPower, growth_rate: float, *,
                      reconstructed: bool = False,
                      smoothing_radius: float = 15.0) -> tuple[float, float]:
    """(Sigma_par, Sigma_perp) in Mpc/h predicted from the linear power at its redshift.

    Parameters
    ----------
    linear_power : LinearPower
        Linear matter power at the redshift of the analysis, (Mpc/h)^3 on h/Mpc.
    growth_rate : float
        Linear growth rate f = dlnD/dlna at that redshift.
    reconstructed : bool
        Damping left after reconstruction with Gaussian smoothing of ``smoothing_radius``.
    smoothing_radius : float
        Reconstruction smoothing radius R, Mpc/h.

    Returns
    -------
    tuple of float
        (Sigma_par, Sigma_perp), Mpc/h, in the order of ``FitSettings.damping``; the
        integral runs over the spectrum's own k grid (trapezoid rule).
    """
    f = float(growth_rate)
    if not np.isfinite(f) or f < 0:
        raise InputError(f"zeldovich_damping: growth rate must be a finite number >= 0, got {f}")
    k, power = linear_power.wiggle
    weight = np.ones_like(k)
    if reconstructed:
        radius = float(smoothing_radius)
        if not np.isfinite(radius) or radius < 0:
            raise InputError("zeldovich_damping: smoothing radius must be >= 0 Mpc/h, got "
                             f"{smoothing_radius}")
        weight = (1.0 - np.exp(-0.5 * (k * radius) ** 2)) ** 2
    sigma_perp = float(np.sqrt(trapezoid(power * weight, k) / (3.0 * np.pi**2)))
    return (1.0 + f) * sigma_perp, sigma_perp
