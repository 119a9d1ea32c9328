"""Parameters and priors of the expansion-history fit.

BAO alone measures distances in units of r_d, so it constrains the expansion history
(Omega_m, w, w0, wa, Omega_k) and only the product h r_d (REFERENCES §14). The sampled
parameters follow from what the user adds:

- nothing: (Omega_m, h_rd, ...); radiation and neutrino densities use a fixed h;
- a Gaussian prior on r_d (Mpc) or on H0: h is sampled too, r_d = h_rd / h;
- a Gaussian prior on omega_b = Omega_b h^2: (Omega_m, h, omega_b, ...) are sampled and r_d
  follows from the fitting formula of Aubourg et al. (2015, eq. 16; REFERENCES §14):
  r_d = 55.154 exp[-72.3 (omega_nu + 0.0006)^2] / (omega_cb^0.25351 omega_b^0.12807) Mpc.

Every parameter also has a flat prior between the bounds given (or the defaults below).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np

from corrpipe.cosmo.models import ExpansionModel
from corrpipe.errors import InputError

__all__ = ["Parameter", "ParameterSpace", "DEFAULT_BOUNDS", "r_d_fitting_formula",
           "NEUTRINO_MASS_PER_OMEGA"]

#: Default flat prior bounds (wide; common practice for BAO-only fits).
DEFAULT_BOUNDS: dict[str, tuple[float, float]] = {
    "Omega_m": (0.01, 0.99), "h_rd": (50.0, 150.0), "w": (-3.0, 1.0), "w0": (-3.0, 1.0),
    "wa": (-3.0, 2.0), "Omega_k": (-0.5, 0.5), "h": (0.4, 1.0), "omega_b": (0.005, 0.05)}

#: Starting point of the best-fit search.
_START = {"Omega_m": 0.3, "h_rd": 100.0, "w": -1.0, "w0": -1.0, "wa": 0.0, "Omega_k": 0.0,
          "h": 0.68, "omega_b": 0.0222}

#: Sum of neutrino masses (eV) per unit omega_nu = Omega_nu h^2 (93.14 eV; common practice,
#: value from memory).
NEUTRINO_MASS_PER_OMEGA = 93.14


def r_d_fitting_formula(omega_cb, omega_b, omega_nu=0.0):
    """Sound horizon at the drag epoch in Mpc (Aubourg et al. 2015, eq. 16 [from memory]).

    Parameters
    ----------
    omega_cb : float or ndarray
        (Omega_c + Omega_b) h^2.
    omega_b : float or ndarray
        Omega_b h^2.
    omega_nu : float
        Omega_nu h^2 of massive neutrinos.
    """
    return (55.154 * np.exp(-72.3 * (omega_nu + 0.0006) ** 2)
            / (np.asarray(omega_cb) ** 0.25351 * np.asarray(omega_b) ** 0.12807))


@dataclass(frozen=True)
class Parameter:
    """A sampled parameter with its flat prior bounds."""

    name: str
    low: float
    high: float
    start: float


@dataclass
class ParameterSpace:
    """The sampled parameters, their priors, and the map to physical quantities.

    Parameters
    ----------
    model : ExpansionModel
    r_d_prior, H0_prior, omega_b_prior : (mean, sigma) or None
        Gaussian priors: r_d in Mpc, H0 in km/s/Mpc, omega_b = Omega_b h^2.
    h_fixed : float
        h of the radiation and neutrino densities when h is not sampled.
    bounds : mapping
        Flat prior bounds overriding :data:`DEFAULT_BOUNDS`.
    """

    model: ExpansionModel
    r_d_prior: tuple | None = None
    H0_prior: tuple | None = None
    omega_b_prior: tuple | None = None
    h_fixed: float = 0.68
    bounds: Mapping[str, tuple] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.r_d_prior is not None and self.omega_b_prior is not None:
            raise InputError("give a prior on r_d or on omega_b, not both (with omega_b, r_d "
                             "follows from the Aubourg et al. 2015 formula)")
        for name, prior in (("r_d", self.r_d_prior), ("H0", self.H0_prior),
                            ("omega_b", self.omega_b_prior)):
            if prior is not None and (len(prior) != 2 or not prior[1] > 0):
                raise InputError(f"the {name} prior must be [mean, sigma] with sigma > 0, got "
                                 f"{list(prior)}")
        names = ["Omega_m"]
        sample_h = any(p is not None for p in (self.r_d_prior, self.H0_prior,
                                               self.omega_b_prior))
        if self.omega_b_prior is None:
            names.append("h_rd")
        if sample_h:
            names.append("h")
        if self.omega_b_prior is not None:
            names.append("omega_b")
        names += [p for p in self.model.parameters if p != "Omega_m"]
        params = []
        for n in names:
            lo, hi = self.bounds.get(n, DEFAULT_BOUNDS[n])
            if not lo < hi:
                raise InputError(f"prior bounds of {n}: low {lo} must be below high {hi}")
            start = min(max(_START[n], lo + 0.1 * (hi - lo)), hi - 0.1 * (hi - lo))
            params.append(Parameter(n, float(lo), float(hi), float(start)))
        self.parameters = tuple(params)
        self.names = tuple(names)
        self.low = np.array([p.low for p in params])
        self.high = np.array([p.high for p in params])
        self.start = np.array([p.start for p in params])
        m_sum = float(np.sum(self.model.m_nu)) if self.model.T_cmb > 0 else 0.0
        self._omega_nu = m_sum / NEUTRINO_MASS_PER_OMEGA
        self.n_gaussian = sum(p is not None for p in (self.r_d_prior, self.H0_prior,
                                                      self.omega_b_prior))

    @property
    def n_dim(self) -> int:
        """Number of sampled parameters."""
        return len(self.names)

    def physical(self, theta: np.ndarray) -> dict[str, float]:
        """Sampled vector -> every quantity the model and priors need.

        Returns Omega_m, h, h_rd, the dark-energy parameters, Omega_k (when free) and, when
        h is sampled, r_d (Mpc) and H0 (km/s/Mpc).
        """
        p = dict(zip(self.names, (float(t) for t in theta)))
        if "h" not in p:
            p["h"] = self.h_fixed
        else:
            p["H0"] = 100.0 * p["h"]
        if "omega_b" in p:
            omega_cb = p["Omega_m"] * p["h"] ** 2
            p["r_d"] = float(r_d_fitting_formula(omega_cb, p["omega_b"], self._omega_nu))
            p["h_rd"] = p["h"] * p["r_d"]
        elif "H0" in p:
            p["r_d"] = p["h_rd"] / p["h"]
        return p

    def physical_many(self, thetas: np.ndarray) -> dict[str, np.ndarray]:
        """:meth:`physical` for an (n, n_dim) array of points; each value shape (n,)."""
        thetas = np.atleast_2d(thetas)
        p = {n: thetas[:, i] for i, n in enumerate(self.names)}
        if "h" not in p:
            p["h"] = np.full(thetas.shape[0], self.h_fixed)
        else:
            p["H0"] = 100.0 * p["h"]
        if "omega_b" in p:
            p["r_d"] = r_d_fitting_formula(p["Omega_m"] * p["h"] ** 2, p["omega_b"],
                                           self._omega_nu)
            p["h_rd"] = p["h"] * p["r_d"]
        elif "H0" in p:
            p["r_d"] = p["h_rd"] / p["h"]
        return p

    def prior_chi2_many(self, p: Mapping[str, np.ndarray]) -> np.ndarray:
        """Sum of squared Gaussian-prior residuals per point."""
        out = np.zeros(np.shape(p["Omega_m"]))
        for prior, key in ((self.r_d_prior, "r_d"), (self.H0_prior, "H0"),
                           (self.omega_b_prior, "omega_b")):
            if prior is not None:
                out += ((p[key] - prior[0]) / prior[1]) ** 2
        return out

    def inside(self, theta: np.ndarray) -> bool:
        """True inside the flat prior bounds."""
        return bool(((theta >= self.low) & (theta <= self.high)).all())

    def prior_residuals(self, p: Mapping[str, float]) -> np.ndarray:
        """(value - mean) / sigma of each Gaussian prior (chi^2 = sum of squares)."""
        out = []
        if self.r_d_prior is not None:
            out.append((p["r_d"] - self.r_d_prior[0]) / self.r_d_prior[1])
        if self.H0_prior is not None:
            out.append((p["H0"] - self.H0_prior[0]) / self.H0_prior[1])
        if self.omega_b_prior is not None:
            out.append((p["omega_b"] - self.omega_b_prior[0]) / self.omega_b_prior[1])
        return np.array(out)
