"""Linear matter power spectrum (Eisenstein & Hu 1998, or a tabulated file) and its no-wiggle part.

Wavenumbers are in h/Mpc and powers in (Mpc/h)^3 everywhere in this module's public API; the
EH98 formulae work internally in 1/Mpc (no factors of h), as in the paper.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.integrate import trapezoid
from scipy.ndimage import gaussian_filter1d

from corrpipe.errors import InputError
from corrpipe.theory import eh98

__all__ = [
    "LinearPower",
    "eh98_transfer",
    "eh98_nowiggle_transfer",
    "tophat_sigma",
    "smooth_nowiggle",
]

_C_KM_S = 299792.458
_K_PIVOT_MPC = 0.05  # 1/Mpc, the usual A_s pivot (Planck 2018 VI, common practice)


def _theta(T_cmb: float) -> float:
    return T_cmb / 2.7


def eh98_transfer(k_h_mpc, h: float, omega_m: float, omega_b: float,
                  T_cmb: float = 2.7255) -> np.ndarray:
    """Matter transfer function with baryon acoustic oscillations (Eisenstein & Hu 1998).

    Parameters
    ----------
    k_h_mpc : array_like
        Wavenumbers, h/Mpc.
    h : float
        Dimensionless Hubble constant.
    omega_m, omega_b : float
        Density parameters Omega_m (cold dark matter plus baryons) and Omega_b.
    T_cmb : float
        CMB temperature today, K.

    Returns
    -------
    ndarray
        T(k), with T -> 1 as k -> 0.

    Notes
    -----
    Eisenstein & Hu 1998, ApJ 496, 605, eqs. 10-24 (cold dark matter part, eqs. 17-20 with
    alpha_c, beta_c of eqs. 11-12; baryon part, eqs. 21-24 with the node shift of eq. 22 and
    alpha_b, beta_b of eqs. 14, 24); equation numbers from memory. The sound horizon is eq. 6
    and the scalars z_eq, k_eq, z_d, R, k_Silk come from :mod:`corrpipe.theory.eh98`.
    """
    k = np.asarray(k_h_mpc, dtype=float) * h  # 1/Mpc
    wm = omega_m * h * h
    wb = omega_b * h * h
    fb = omega_b / omega_m
    fc = 1.0 - fb
    z_eq = eh98.z_equality(wm, T_cmb)
    k_eq = eh98.k_equality(wm, T_cmb)
    z_d = eh98.drag_redshift(wm, wb)
    r_d = eh98.baryon_ratio(z_d, wb, T_cmb)
    s = eh98.sound_horizon_eq6(wm, wb, T_cmb)
    k_silk = eh98.silk_scale(wm, wb)

    q = k / (13.41 * k_eq)
    ks = k * s

    # Cold dark matter (eqs. 11, 12, 17-20).
    a1 = (46.9 * wm) ** 0.670 * (1.0 + (32.1 * wm) ** -0.532)
    a2 = (12.0 * wm) ** 0.424 * (1.0 + (45.0 * wm) ** -0.582)
    alpha_c = a1 ** (-fb) * a2 ** (-fb**3)
    b1 = 0.944 / (1.0 + (458.0 * wm) ** -0.708)
    b2 = (0.395 * wm) ** -0.0266
    beta_c = 1.0 / (1.0 + b1 * (fc**b2 - 1.0))

    def t0_tilde(alpha: float, beta: float) -> np.ndarray:
        log_term = np.log(np.e + 1.8 * beta * q)
        c = 14.2 / alpha + 386.0 / (1.0 + 69.9 * q**1.08)
        return log_term / (log_term + c * q * q)

    f = 1.0 / (1.0 + (ks / 5.4) ** 4)
    t_cdm = f * t0_tilde(1.0, beta_c) + (1.0 - f) * t0_tilde(alpha_c, beta_c)

    # Baryons (eqs. 14, 21-24).
    y = z_eq / (1.0 + z_d)  # z_eq here is really 1 + z_eq (EH98 eq. 2 footnote)
    sq = np.sqrt(1.0 + y)
    g_of_y = y * (-6.0 * sq + (2.0 + 3.0 * y) * np.log((sq + 1.0) / (sq - 1.0)))
    alpha_b = 2.07 * k_eq * s * (1.0 + r_d) ** -0.75 * g_of_y
    beta_node = 8.41 * wm**0.435
    beta_b = 0.5 + fb + (3.0 - 2.0 * fb) * np.sqrt((17.2 * wm) ** 2 + 1.0)
    with np.errstate(divide="ignore", over="ignore"):
        s_tilde = s / np.cbrt(1.0 + (beta_node / ks) ** 3)
        x = k * s_tilde
        j0 = np.where(x > 1e-8, np.sin(x) / np.where(x > 1e-8, x, 1.0), 1.0)
        t_b = (t0_tilde(1.0, 1.0) / (1.0 + (ks / 5.2) ** 2)
               + alpha_b / (1.0 + (beta_b / ks) ** 3) * np.exp(-((k / k_silk) ** 1.4))) * j0
    return fb * t_b + fc * t_cdm


def eh98_nowiggle_transfer(k_h_mpc, h: float, omega_m: float, omega_b: float,
                           T_cmb: float = 2.7255) -> np.ndarray:
    """Smooth ("no-wiggle") transfer function of Eisenstein & Hu (1998), section 4.2.

    Parameters
    ----------
    k_h_mpc : array_like
        Wavenumbers, h/Mpc.
    h, omega_m, omega_b, T_cmb
        As in :func:`eh98_transfer`.

    Notes
    -----
    Eisenstein & Hu 1998, eqs. 28-31 [numbers from memory]: T0 = L0/(L0 + C0 q^2),
    L0 = ln(2e + 1.8 q), C0 = 14.2 + 731/(1 + 62.5 q), q = k Theta^2 / Gamma_eff (k in h/Mpc),
    Gamma_eff = Omega_m h [alpha_G + (1 - alpha_G)/(1 + (0.43 k s)^4)] with s from eq. 26.
    """
    k = np.asarray(k_h_mpc, dtype=float)
    wm = omega_m * h * h
    wb = omega_b * h * h
    fb = omega_b / omega_m
    s = eh98.sound_horizon_fit(wm, wb)  # Mpc
    alpha_g = 1.0 - 0.328 * np.log(431.0 * wm) * fb + 0.38 * np.log(22.3 * wm) * fb * fb
    gamma_eff = omega_m * h * (alpha_g + (1.0 - alpha_g) / (1.0 + (0.43 * k * h * s) ** 4))
    q = k * _theta(T_cmb) ** 2 / gamma_eff
    l0 = np.log(2.0 * np.e + 1.8 * q)
    c0 = 14.2 + 731.0 / (1.0 + 62.5 * q)
    return l0 / (l0 + c0 * q * q)


def tophat_sigma(k, pk, radius: float) -> float:
    """RMS linear fluctuation in a spherical top hat.

    Parameters
    ----------
    k : ndarray
        Wavenumbers, h/Mpc, logarithmically spaced and wide enough for convergence.
    pk : ndarray
        Power at ``k``, (Mpc/h)^3.
    radius : float
        Top-hat radius, Mpc/h (8 for sigma_8).

    Notes
    -----
    sigma^2(R) = 1/(2 pi^2) int k^2 P(k) W^2(kR) dk, W(x) = 3 (sin x - x cos x)/x^3
    (common practice; e.g. Peebles 1980 [from memory]).
    """
    x = np.asarray(k) * radius
    w = np.where(x > 1e-4, 3.0 * (np.sin(x) - x * np.cos(x)) / np.maximum(x, 1e-4) ** 3,
                 1.0 - x * x / 10.0)
    integrand = k**3 * pk * w * w / (2.0 * np.pi**2)  # d ln k measure
    return float(np.sqrt(trapezoid(integrand, np.log(k))))


def smooth_nowiggle(k, pk, reference_nowiggle, width_ln_k: float = 0.25) -> np.ndarray:
    """No-wiggle power of a tabulated spectrum by Gaussian smoothing in ln k.

    Parameters
    ----------
    k : ndarray
        Wavenumbers, h/Mpc, logarithmically spaced.
    pk : ndarray
        Linear power with wiggles, (Mpc/h)^3.
    reference_nowiggle : ndarray
        A smooth reference shape at ``k`` (EH98 no-wiggle power), any normalisation.
    width_ln_k : float
        Gaussian width in ln k.

    Returns
    -------
    ndarray
        P_nw = P_ref * G_lambda[P / P_ref], the ratio smoothed with a Gaussian in ln k.

    Notes
    -----
    The ratio to a smooth analytic shape is smoothed with a Gaussian of width lambda = 0.25 in
    ln k, following Vlah et al. 2016, JCAP 03, 057, appendix A [from memory]. Edges are padded
    by reflection.
    """
    ln_k = np.log(k)
    step = float(np.mean(np.diff(ln_k)))
    ratio = pk / reference_nowiggle
    smoothed = gaussian_filter1d(ratio, width_ln_k / step, mode="nearest")
    return reference_nowiggle * smoothed


@dataclass(frozen=True)
class LinearPower:
    """A linear matter power spectrum and its smooth (no-wiggle) counterpart on a log-k grid.

    Parameters
    ----------
    k : ndarray, shape (n_k,)
        Wavenumbers, h/Mpc, logarithmically spaced and increasing.
    power : ndarray, shape (n_k,)
        Linear power with baryon wiggles, (Mpc/h)^3.
    power_nowiggle : ndarray, shape (n_k,)
        Smooth counterpart, (Mpc/h)^3.
    z : float
        Redshift of the spectrum.
    sound_horizon : float
        Sound horizon that sets the spectrum's BAO scale, Mpc: EH98 eq. 6 for the EH98
        spectra, the cosmology's r_d for a tabulated file. Dilations are measured relative
        to it, so distances D/r_d are converted with it.
    h : float
        Dimensionless Hubble constant of the spectrum's cosmology.
    source : str
        Where it came from (``"eisenstein-hu"``, ``"eisenstein-hu nowiggle"``, or the file).
    """

    k: np.ndarray
    power: np.ndarray
    power_nowiggle: np.ndarray
    z: float
    sound_horizon: float
    h: float
    source: str
    meta: dict = field(default_factory=dict)

    def __call__(self, k) -> np.ndarray:
        """Power at ``k`` (h/Mpc) in (Mpc/h)^3, log-log interpolated, power laws beyond the grid."""
        return _loglog(self.k, self.power, k)

    @property
    def wiggle(self) -> tuple[np.ndarray, np.ndarray]:
        """(k [h/Mpc], P [(Mpc/h)^3]) table of the power with wiggles."""
        return self.k, self.power

    def nowiggle(self, k) -> np.ndarray:
        """No-wiggle power at ``k`` (h/Mpc) in (Mpc/h)^3."""
        return _loglog(self.k, self.power_nowiggle, k)

    def sigma(self, radius: float = 8.0) -> float:
        """RMS linear fluctuation in a top hat of ``radius`` Mpc/h."""
        return tophat_sigma(self.k, self.power, radius)

    @classmethod
    def eisenstein_hu(cls, cosmology: Any, z: float = 0.0, kind: str = "wiggle", *,
                      normalisation: str = "sigma8", A_s: float | None = None,
                      k_min: float = 1e-5, k_max: float = 1e3, n_k: int = 4096) -> "LinearPower":
        """EH98 linear power at redshift ``z`` for a fiducial cosmology.

        Parameters
        ----------
        cosmology : corrpipe.cosmology.Cosmology
            Fiducial cosmology (h, omega_m, omega_b, n_s, sigma8, T_cmb, growth_factor).
        z : float
            Redshift; the z = 0 spectrum is scaled by the linear growth factor D(z)^2.
        kind : {"wiggle", "nowiggle"}
            ``"wiggle"``: full EH98 transfer function, with the no-wiggle form sharing its
            amplitude. ``"nowiggle"``: both arrays hold the no-wiggle form.
        normalisation : {"sigma8", "A_s"}
            Normalise to the cosmology's sigma8 at z = 0, or to a primordial amplitude.
        A_s : float, optional
            Primordial curvature amplitude at k = 0.05/Mpc (needed for ``"A_s"``).
        k_min, k_max : float
            Grid range, h/Mpc.
        n_k : int
            Number of log-spaced grid points.

        Notes
        -----
        A_s normalisation: Delta^2(k) = (4/25) A_s (k/k_p)^(n_s - 1) (c k / H0)^4
        T(k)^2 [g(0)/Omega_m]^2 with g(0) = D(a=1)/a the growth suppression of linear growth
        normalised to a in matter domination (e.g. Dodelson 2003, eq. 7.93 [from memory]);
        g is computed from the Heath (1977) integral, exact for flat or curved Lambda-CDM.
        """
        if kind not in ("wiggle", "nowiggle"):
            raise InputError(f"LinearPower.eisenstein_hu: kind must be 'wiggle' or 'nowiggle', "
                             f"got {kind!r}")
        if normalisation not in ("sigma8", "A_s"):
            raise InputError(f"LinearPower.eisenstein_hu: normalisation must be 'sigma8' or "
                             f"'A_s', got {normalisation!r}")
        h, om, ob = float(cosmology.h), float(cosmology.omega_m), float(cosmology.omega_b)
        T_cmb, n_s = float(cosmology.T_cmb), float(cosmology.n_s)
        k = np.geomspace(k_min, k_max, n_k)
        t_nw = eh98_nowiggle_transfer(k, h, om, ob, T_cmb)
        t_w = eh98_transfer(k, h, om, ob, T_cmb) if kind == "wiggle" else t_nw
        shape_w = k**n_s * t_w**2
        shape_nw = k**n_s * t_nw**2
        if normalisation == "sigma8":
            amp = (float(cosmology.sigma8) / tophat_sigma(k, shape_w, 8.0)) ** 2
        else:
            if A_s is None or not np.isfinite(A_s) or A_s <= 0:
                raise InputError("LinearPower.eisenstein_hu: normalisation 'A_s' needs a "
                                 f"positive A_s (e.g. 2.1e-9), got {A_s!r}")
            g0 = _growth_suppression(om, getattr(cosmology, "omega_k", 0.0))
            h0_mpc = 100.0 * h / _C_KM_S  # H0/c in 1/Mpc
            k_mpc = k * h
            delta2 = (4.0 / 25.0) * A_s * (k_mpc / _K_PIVOT_MPC) ** (n_s - 1.0) \
                * (k_mpc / h0_mpc) ** 4 * (g0 / om) ** 2
            amp = float(np.median(delta2 * 2.0 * np.pi**2 / k**3 / shape_w * t_w**2))
        growth = float(np.asarray(cosmology.growth_factor(z))) if z != 0 else 1.0
        wm, wb = om * h * h, ob * h * h
        return cls(k=k, power=amp * shape_w * growth**2, power_nowiggle=amp * shape_nw * growth**2,
                   z=float(z), sound_horizon=eh98.sound_horizon_eq6(wm, wb, T_cmb), h=h,
                   source="eisenstein-hu" if kind == "wiggle" else "eisenstein-hu nowiggle",
                   meta={"normalisation": normalisation, "amplitude": amp})

    @classmethod
    def from_file(cls, path: str | Path, cosmology: Any, *, z: float = float("nan"),
                  width_ln_k: float = 0.25, n_k: int = 4096, k_min: float = 1e-5,
                  k_max: float = 1e3) -> "LinearPower":
        """Read a tabulated linear P(k) (two columns: k in h/Mpc, P in (Mpc/h)^3).

        Parameters
        ----------
        path : str or Path
            Text file; ``#`` starts a comment. Any Boltzmann code's output in these units.
        cosmology : corrpipe.cosmology.Cosmology
            Cosmology used for the smooth reference shape of the wiggle/no-wiggle split.
        z : float
            Redshift the table was computed for (stored only; the table is used as given).
        width_ln_k : float
            Smoothing width of the no-wiggle split, in ln k (see :func:`smooth_nowiggle`).
        n_k, k_min, k_max
            Log-spaced grid the table is resampled onto, h/Mpc. Beyond the table the power is
            continued as k^n_s at low k and with the last log-log slope at high k.

        Raises
        ------
        InputError
            Missing or unreadable file, wrong number of columns, non-positive or unsorted
            values, or a table that does not cover 0.005-0.5 h/Mpc (the BAO range).
        """
        path = Path(path)
        if not path.is_file():
            raise InputError(f"linear power file {path} does not exist; give a text table "
                             "with two columns: k [h/Mpc] and P(k) [(Mpc/h)^3]")
        try:
            table = np.loadtxt(path, comments="#", ndmin=2)
        except ValueError as exc:
            raise InputError(f"linear power file {path} is not a numeric text table "
                             f"({exc}); expected two columns k [h/Mpc], P [(Mpc/h)^3]") from exc
        if table.shape[1] < 2:
            raise InputError(f"linear power file {path} has {table.shape[1]} column(s); "
                             "expected two: k [h/Mpc] and P(k) [(Mpc/h)^3]")
        k_tab, p_tab = table[:, 0], table[:, 1]
        if k_tab.size < 20:
            raise InputError(f"linear power file {path} has only {k_tab.size} rows; give at "
                             "least 20 (a few hundred log-spaced k values is usual)")
        bad = ~(np.isfinite(k_tab) & np.isfinite(p_tab) & (k_tab > 0) & (p_tab > 0))
        if bad.any():
            rows = np.flatnonzero(bad)[:5] + 1
            raise InputError(f"linear power file {path}: {bad.sum()} row(s) with non-positive "
                             f"or non-finite k or P (data rows {rows.tolist()}...)")
        if np.any(np.diff(k_tab) <= 0):
            raise InputError(f"linear power file {path}: k must increase strictly from row to "
                             "row; sort the table by k")
        if k_tab[0] > 0.005 or k_tab[-1] < 0.5:
            raise InputError(f"linear power file {path} covers k = {k_tab[0]:g}-{k_tab[-1]:g} "
                             "h/Mpc; it must cover at least 0.005-0.5 h/Mpc (the BAO range). "
                             "Check the units (k in h/Mpc, not 1/Mpc)")
        k = np.geomspace(k_min, k_max, n_k)
        n_s = float(cosmology.n_s)
        p = _loglog(k_tab, p_tab, k, low_slope=n_s)
        h, om, ob = float(cosmology.h), float(cosmology.omega_m), float(cosmology.omega_b)
        ref = k**n_s * eh98_nowiggle_transfer(k, h, om, ob, float(cosmology.T_cmb)) ** 2
        p_nw = smooth_nowiggle(k, p, ref, width_ln_k)
        # The table's BAO scale is the sound horizon of the code that made it: take the
        # cosmology's r_d (set it to the Boltzmann code's r_drag for an exact conversion).
        return cls(k=k, power=p, power_nowiggle=p_nw, z=float(z),
                   sound_horizon=float(cosmology.sound_horizon()), h=h,
                   source=str(path), meta={"width_ln_k": width_ln_k})


def _loglog(x, y, x_new, low_slope: float | None = None) -> np.ndarray:
    """Log-log linear interpolation with power-law continuation beyond both ends."""
    lx, ly = np.log(x), np.log(y)
    lxn = np.log(np.asarray(x_new, dtype=float))
    out = np.interp(lxn, lx, ly)
    s_lo = (ly[1] - ly[0]) / (lx[1] - lx[0]) if low_slope is None else low_slope
    s_hi = (ly[-1] - ly[-2]) / (lx[-1] - lx[-2])
    out = np.where(lxn < lx[0], ly[0] + s_lo * (lxn - lx[0]), out)
    out = np.where(lxn > lx[-1], ly[-1] + s_hi * (lxn - lx[-1]), out)
    return np.exp(out)


def _growth_suppression(omega_m: float, omega_k: float = 0.0) -> float:
    """g(a=1) = D(1)/a for Lambda-CDM, with D -> a in matter domination (Heath 1977 integral)."""
    from scipy.integrate import quad

    omega_l = 1.0 - omega_m - omega_k

    def e_of_a(a: float) -> float:
        return np.sqrt(omega_m / a**3 + omega_k / a**2 + omega_l)

    integral, _ = quad(lambda a: 1.0 / (a * e_of_a(a)) ** 3, 0.0, 1.0)
    return 2.5 * omega_m * e_of_a(1.0) * integral
