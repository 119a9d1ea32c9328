"""Settings of the expansion-history fit (the batch-level ``[expansion]`` config table)."""

from __future__ import annotations

from dataclasses import dataclass

from corrpipe.cosmo.models import MODELS, ExpansionModel
from corrpipe.cosmo.priors import DEFAULT_BOUNDS, ParameterSpace
from corrpipe.errors import ConfigError
from corrpipe.settings import setting

__all__ = ["ExpansionSettings", "LIKELIHOODS"]

#: ``gaussian``: each bin's mean and covariance; ``chain-density``: each bin's sample density.
LIKELIHOODS = ("gaussian", "chain-density")


def _range(name: str, doc: str, unit: str | None = None):
    return setting(DEFAULT_BOUNDS[name], f"flat prior [low, high] on {doc}", unit=unit)


@dataclass(frozen=True)
class ExpansionSettings:
    """Config table ``[expansion]``: fit expansion-history models to the batch's BAO distances.

    Runs once per batch, after every analysis (each analysis must have a fit); its inputs are
    the analyses' stored BAO fits and any external measurement files.
    """

    enabled: bool = setting(False, "run the expansion-history fit after the analyses")
    model: str = setting("flat-lcdm", "expansion history: flat LCDM (Omega_m, h r_d), "
                         "constant w, or w0 + wa (1 - a)", choices=tuple(MODELS))
    curvature: bool = setting(False, "free spatial curvature Omega_k")
    analyses: tuple[str, ...] = setting((), "analyses whose distances enter (empty: all; "
                                        "none with use_analyses = false)")
    use_analyses: bool = setting(True, "use the batch's own analyses (false: external "
                                 "files only)")
    external: tuple[str, ...] = setting((), "external measurement files (ECSV: z, quantity, "
                                        "value + covariance; README)", path=True)
    likelihood: str = setting("gaussian", "per-bin likelihood: mean and 2x2 covariance of "
                              "the bin's chain, or the chain's kernel density",
                              choices=LIKELIHOODS)
    cross_covariance: str = setting("", "ECSV file of covariances between different bins "
                                    "(label_a, quantity_a, label_b, quantity_b, covariance)",
                                    path=True)
    mock_distances: str = setting("", "ECSV table of per-mock distances of every bin "
                                  "(columns '<bin>:<quantity>'): cross-bin correlations",
                                  path=True)
    independent: bool = setting(False, "declare bins with overlapping redshift ranges "
                                "independent (e.g. separate sky regions)")
    r_d_prior: tuple[float, ...] = setting((), "Gaussian prior [mean, sigma] on r_d",
                                           unit="Mpc")
    H0_prior: tuple[float, ...] = setting((), "Gaussian prior [mean, sigma] on H0",
                                          unit="km/s/Mpc")
    omega_b_prior: tuple[float, ...] = setting((), "Gaussian prior [mean, sigma] on Omega_b "
                                               "h^2; r_d from Aubourg et al. 2015 eq. 16")
    h_fixed: float = setting(0.68, "h of the radiation density when h is not sampled",
                             low=0.3, high=1.2)
    T_cmb: float = setting(2.7255, "CMB temperature (0: no radiation)", unit="K", low=0.0,
                           high=5.0)
    N_eff: float = setting(3.044, "effective number of neutrino species", low=0.0, high=10.0)
    neutrino_mass: float = setting(0.06, "mass of the one massive neutrino (two massless)",
                                   unit="eV", low=0.0, high=2.0)
    omega_m_range: tuple[float, ...] = _range("Omega_m", "Omega_m")
    h_rd_range: tuple[float, ...] = _range("h_rd", "h r_d", "Mpc")
    w_range: tuple[float, ...] = _range("w", "w (wcdm)")
    w0_range: tuple[float, ...] = _range("w0", "w0 (w0wacdm)")
    wa_range: tuple[float, ...] = _range("wa", "wa (w0wacdm)")
    omega_k_range: tuple[float, ...] = _range("Omega_k", "Omega_k (curvature = true)")
    h_range: tuple[float, ...] = _range("h", "h (sampled with an r_d, H0 or omega_b prior)")
    omega_b_range: tuple[float, ...] = _range("omega_b", "Omega_b h^2 (omega_b prior)")
    n_walkers: int = setting(32, "emcee walkers", low=8, high=1024)
    max_steps: int = setting(20000, "cap on steps per walker", low=100)
    check_every: int = setting(200, "steps between convergence checks", low=10)
    tau_factor: float = setting(50.0, "converged when steps > tau_factor x autocorrelation "
                                "time", low=5.0)
    plots: bool = setting(True, "write the distance-redshift and contour plots")
    dpi: int = setting(120, "resolution of the PNG plots", low=30, high=600)

    def validate(self) -> None:
        """Cross-field checks (run when the config is loaded)."""
        for key in ("r_d_prior", "H0_prior", "omega_b_prior"):
            v = getattr(self, key)
            if v and (len(v) != 2 or not v[1] > 0):
                raise ConfigError(f"{key} = {list(v)} must be [mean, sigma] with sigma > 0 "
                                  "(or [] for none)")
        if self.r_d_prior and self.omega_b_prior:
            raise ConfigError("set r_d_prior or omega_b_prior, not both (with omega_b, r_d "
                              "follows from the fitting formula)")
        for key in ("omega_m_range", "h_rd_range", "w_range", "w0_range", "wa_range",
                    "omega_k_range", "h_range", "omega_b_range"):
            v = getattr(self, key)
            if len(v) != 2 or not v[0] < v[1]:
                raise ConfigError(f"{key} = {list(v)} must be [low, high] with low < high")
        if self.n_walkers < 2 * len(self.space().names):
            raise ConfigError(f"n_walkers = {self.n_walkers} must be at least twice the "
                              f"number of sampled parameters ({len(self.space().names)})")
        if not self.use_analyses and not self.external:
            raise ConfigError("use_analyses = false needs at least one external file")

    def expansion_model(self) -> ExpansionModel:
        """The model family with its radiation content."""
        return ExpansionModel(self.model, curvature=self.curvature, T_cmb=self.T_cmb,
                              N_eff=self.N_eff, m_nu=(0.0, 0.0, self.neutrino_mass))

    def space(self) -> ParameterSpace:
        """Sampled parameters with their flat and Gaussian priors."""
        bounds = {"Omega_m": self.omega_m_range, "h_rd": self.h_rd_range, "w": self.w_range,
                  "w0": self.w0_range, "wa": self.wa_range, "Omega_k": self.omega_k_range,
                  "h": self.h_range, "omega_b": self.omega_b_range}
        return ParameterSpace(self.expansion_model(),
                              r_d_prior=tuple(self.r_d_prior) or None,
                              H0_prior=tuple(self.H0_prior) or None,
                              omega_b_prior=tuple(self.omega_b_prior) or None,
                              h_fixed=self.h_fixed,
                              bounds={k: tuple(v) for k, v in bounds.items()})
