"""Settings of the BAO fit (the ``[fit]`` config table)."""

from __future__ import annotations

import dataclasses
import hashlib
import json
from dataclasses import dataclass

from corrpipe.errors import ConfigError
from corrpipe.settings import fingerprint_values, setting

__all__ = ["FitSettings", "PRE_RECON_DAMPING", "POST_RECON_DAMPING"]

# Default BAO damping scales (Sigma_par, Sigma_perp) in Mpc/h [from memory]: pre-reconstruction
# ~10 and ~6; after reconstruction ~4-5 and ~2-3 (consistent with the isotropic Sigma_nl
# dropping from 8.1 to 4.4 Mpc/h, Padmanabhan et al. 2012, REFERENCES §8).
PRE_RECON_DAMPING = (10.0, 6.0)
POST_RECON_DAMPING = (4.5, 2.5)

# Settings that only say how long to sample; changing them continues a stored chain.
_RUN_LENGTH_KEYS = ("max_steps", "check_every", "tau_factor", "tau_tolerance", "profile_points")


@dataclass(frozen=True)
class FitSettings:
    """How to fit a BAO template to measured correlation-function multipoles.

    Damping scales left empty take the pre- or post-reconstruction defaults
    (:data:`PRE_RECON_DAMPING`, :data:`POST_RECON_DAMPING`). Priors: flat on the dilations and
    on B's range; Gaussian on beta, on ln B (centred on the amplitude that best fits the data
    at alpha = 1) and on the damping scales, each switched off (parameter fixed, or flat for
    B) by a width of 0 (common practice; typical choices in REFERENCES §7 [from memory]).
    """

    analysis: str = setting("anisotropic", "fit alpha_par and alpha_perp to the multipoles, or "
                            "one alpha to the monopole", choices=("anisotropic", "isotropic"))
    ells: tuple[int, ...] = setting((0, 2), "multipoles fitted (an isotropic fit uses the "
                                    "monopole only)",
                                    choices=(0, 2, 4))
    s_min: float = setting(50.0, "smallest separation fitted", unit="Mpc/h", low=0.0,
                           high=500.0, low_open=True)
    s_max: float = setting(150.0, "largest separation fitted", unit="Mpc/h", low=0.0,
                           high=500.0, low_open=True)
    broadband_powers: tuple[int, ...] = setting(
        (0, -1, -2), "powers of s of the broadband polynomial added to each multipole "
        "(marginalised analytically)", low=-4, high=2)
    parametrisation: str = setting("par-perp", "sampled dilations: alpha_par, alpha_perp, or "
                                   "alpha, epsilon (Xu et al. 2013)",
                                   choices=("par-perp", "alpha-epsilon"))
    alpha_min: float = setting(0.8, "lower edge of the flat prior on each alpha", low=0.3,
                               high=2.0)
    alpha_max: float = setting(1.2, "upper edge of the flat prior on each alpha", low=0.3,
                               high=2.0)
    epsilon_max: float = setting(0.15, "flat prior |epsilon| < epsilon_max (alpha-epsilon "
                                 "sampling)", low=0.0, high=0.5, low_open=True)
    # --- template
    power_spectrum: str = setting("eisenstein-hu", "linear power: EH98 at the fiducial "
                                  "cosmology or a tabulated file", choices=("eisenstein-hu",
                                                                            "file"))
    power_file: str = setting("", "two-column text file k [h/Mpc], P(k) [(Mpc/h)^3] "
                              "(power_spectrum = 'file')", path=True)
    normalisation: str = setting("sigma8", "EH98 amplitude from the cosmology's sigma8 or "
                                 "from A_s", choices=("sigma8", "A_s"))
    A_s: float = setting(2.1e-9, "primordial amplitude at k = 0.05/Mpc (normalisation = "
                         "'A_s')", low=0.0, high=1e-7, low_open=True)
    nowiggle_width: float = setting(0.25, "Gaussian width in ln k of the no-wiggle split of a "
                                    "tabulated P(k)", low=0.05, high=1.0)
    reconstructed: bool = setting(False, "the data were reconstructed (changes the default "
                                  "damping scales and the RSD term)")
    recon_convention: str = setting("remove-rsd", "post-reconstruction RSD term: "
                                    "reconstruction removed the linear RSD, or kept it",
                                    choices=("remove-rsd", "keep-rsd"))
    smoothing_radius: float = setting(15.0, "Gaussian smoothing radius of the reconstruction",
                                      unit="Mpc/h", low=0.0, high=100.0)
    sigma_par: float | None = setting(None, "BAO damping along the line of sight (empty: "
                                      "from damping_model)", unit="Mpc/h",
                                      low=0.0, high=30.0)
    sigma_perp: float | None = setting(None, "BAO damping across the line of sight (empty: "
                                       "from damping_model)", unit="Mpc/h",
                                       low=0.0, high=30.0)
    damping_model: str = setting("zeldovich", "what an empty sigma_par or sigma_perp takes: "
                                 "'zeldovich' (from the linear power at z_eff: Sigma_perp^2 = "
                                 "int P dk / 3 pi^2, Sigma_par = (1 + f) Sigma_perp, after "
                                 "reconstruction weighted by (1 - S)^2; follows D(z) sigma8) "
                                 "or 'fixed' (10 / 6 Mpc/h pre-, 4.5 / 2.5 post-reconstruction, "
                                 "values for z ~ 0.5)",
                                 choices=("fixed", "zeldovich"))
    sigma_s: float = setting(4.0, "finger-of-god damping scale", unit="Mpc/h", low=0.0,
                             high=30.0)
    sigma_prior_width: float = setting(0.0, "Gaussian prior width on sigma_par and sigma_perp, "
                                       "truncated at 3 widths (0: fixed; free damping "
                                       "tabulates the template over the prior once, a few "
                                       "seconds to a minute)", unit="Mpc/h", low=0.0,
                                       high=10.0)
    beta: float = setting(0.4, "RSD parameter beta = f/b (prior centre)", low=0.0, high=3.0)
    beta_prior_width: float = setting(0.2, "Gaussian prior width on beta in anisotropic fits "
                                      "(0: fixed; isotropic fits always fix beta)", low=0.0,
                                      high=3.0)
    B_min: float = setting(0.01, "lower edge of the flat prior on the amplitude B", low=0.0,
                           high=100.0, low_open=True)
    B_max: float = setting(100.0, "upper edge of the flat prior on the amplitude B", low=0.0,
                           high=1000.0, low_open=True)
    log_B_prior_width: float = setting(0.4, "Gaussian prior width on ln B around the best-fit "
                                       "amplitude at alpha = 1 (0: flat)", low=0.0, high=10.0)
    hankel_damping: float = setting(1.0, "Gaussian damping length exp(-k^2 a^2) of the Hankel "
                                    "transform", unit="Mpc/h", low=0.0, high=5.0)
    n_mu: int = setting(16, "Gauss-Legendre nodes in mu for the dilation projection", low=4,
                        high=64)
    # --- line interlopers (an optional model term; see corrpipe.fit.terms)
    target_line: str = setting("", "interloper term: the line the sample's redshifts were "
                               "assigned from, a name (Lya, OII, Hb, OIII4959, OIII5007, Ha) "
                               "or a rest wavelength in Angstrom (empty: no interloper term)", neutral_default=True)
    interloper_line: str = setting("", "interloper term: the line mistaken for the target line "
                                   "(name or rest wavelength in Angstrom)", neutral_default=True)
    line_medium: str = setting("vacuum", "medium of rest wavelengths given as numbers (named "
                               "lines are vacuum values)", choices=("vacuum", "air"), neutral_default=True)
    interloper_fraction: float = setting(0.0, "interloper fraction f: Gaussian prior centre, "
                                         "or the starting point of a flat prior", low=0.0,
                                         high=1.0, high_open=True, neutral_default=True)
    interloper_fraction_width: float = setting(0.0, "Gaussian prior width on f (0: flat on "
                                               "[0, interloper_fraction_max])", low=0.0,
                                               high=1.0, neutral_default=True)
    interloper_fraction_max: float = setting(0.5, "upper edge of the prior on f", low=0.0,
                                             high=1.0, low_open=True, high_open=True, neutral_default=True)
    interloper_bias: float = setting(1.5, "linear bias of the interloper population at its true "
                                     "redshift (prior centre)", low=0.0, high=10.0,
                                     low_open=True, neutral_default=True)
    interloper_bias_width: float = setting(0.0, "Gaussian prior width on the interloper bias "
                                           "(0: fixed)", low=0.0, high=10.0, neutral_default=True)
    interloper_sigma_par: float | None = setting(None, "BAO damping of the interloper "
                                                 "population along its line of sight (empty: "
                                                 "sigma_par scaled by the growth factor "
                                                 "ratio)", unit="Mpc/h", low=0.0, high=30.0, neutral_default=True)
    interloper_sigma_perp: float | None = setting(None, "BAO damping of the interloper "
                                                  "population across its line of sight "
                                                  "(empty: sigma_perp scaled the same way)",
                                                  unit="Mpc/h", low=0.0, high=30.0, neutral_default=True)
    interloper_growth_rate: float | None = setting(None, "growth rate f of the interloper "
                                                   "population (empty: the fiducial "
                                                   "cosmology's at its true redshift)",
                                                   low=0.0, high=3.0, neutral_default=True)
    # --- sampling
    n_walkers: int = setting(32, "emcee walkers", low=4, high=1024)
    max_steps: int = setting(20000, "cap on steps per walker", low=10, high=10_000_000)
    check_every: int = setting(200, "steps between convergence checks (and progress file "
                               "flushes of the convergence record)", low=10, high=100_000)
    tau_factor: float = setting(50.0, "converged when steps > tau_factor * autocorrelation "
                                "time", low=5.0, high=1000.0)
    tau_tolerance: float = setting(0.02, "and when tau changed by less than this fraction "
                                   "since the last check", low=0.0, high=1.0, low_open=True)
    seed: int = setting(1, "seed of the sampler (the pipeline passes its own)", low=0)
    profile_points: int = setting(41, "points of the chi^2 profile over alpha_iso (0: none)",
                                  low=0, high=1000)

    def __post_init__(self) -> None:
        object.__setattr__(self, "ells", tuple(int(x) for x in self.ells))
        object.__setattr__(self, "broadband_powers",
                           tuple(int(x) for x in self.broadband_powers))

    # ------------------------------------------------------------------ checks
    def validate(self) -> None:
        """Cross-field checks; raise ConfigError naming the keys."""
        if self.s_min >= self.s_max:
            raise ConfigError(f"fit: s_min = {self.s_min} must be below s_max = {self.s_max}")
        if self.alpha_min >= self.alpha_max:
            raise ConfigError(f"fit: the alpha prior is empty: alpha_min = {self.alpha_min} "
                              f"must be below alpha_max = {self.alpha_max}")
        if not (self.alpha_min < 1.0 < self.alpha_max):
            raise ConfigError(f"fit: the alpha prior [{self.alpha_min}, {self.alpha_max}] must "
                              "contain the fiducial value 1")
        if self.B_min >= self.B_max:
            raise ConfigError(f"fit: the B prior is empty: B_min = {self.B_min} must be below "
                              f"B_max = {self.B_max}")
        if len(set(self.ells)) != len(self.ells) or list(self.ells) != sorted(self.ells):
            raise ConfigError(f"fit: ells = {list(self.ells)} must be increasing without "
                              "repeats, e.g. [0, 2]")
        if self.analysis == "anisotropic" and 0 not in self.ells or \
                self.analysis == "anisotropic" and len(self.ells) < 2:
            raise ConfigError(f"fit: an anisotropic fit needs the monopole and at least one "
                              f"more multipole; got ells = {list(self.ells)}")
        if len(set(self.broadband_powers)) != len(self.broadband_powers):
            raise ConfigError(f"fit: broadband_powers = {list(self.broadband_powers)} repeats "
                              "a power")
        if bool(self.target_line) != bool(self.interloper_line):
            given, missing = (("target_line", "interloper_line") if self.target_line else
                              ("interloper_line", "target_line"))
            raise ConfigError(f"fit: {given} is set but {missing} is empty; the interloper "
                              "term needs both lines (or neither, for no term)")
        if self.interloper_term:
            from corrpipe.errors import InputError
            from corrpipe.theory.interlopers import rest_wavelength

            for key in ("target_line", "interloper_line"):
                try:
                    rest_wavelength(getattr(self, key), self.line_medium)
                except InputError as exc:
                    raise ConfigError(f"fit: {key}: {exc}") from None
            if self.interloper_fraction >= self.interloper_fraction_max:
                raise ConfigError(f"fit: interloper_fraction = {self.interloper_fraction} must "
                                  f"be below interloper_fraction_max = "
                                  f"{self.interloper_fraction_max}")
            if self.reconstructed:
                raise ConfigError("fit: the interloper term models data before "
                                  "reconstruction; fit reconstructed data without it (remove "
                                  "target_line and interloper_line)")
        if self.power_spectrum == "file" and not self.power_file:
            raise ConfigError("fit: power_spectrum = 'file' needs power_file (two columns: "
                              "k [h/Mpc], P [(Mpc/h)^3])")

    # ------------------------------------------------------------------ resolved values
    @property
    def recon_convention_resolved(self) -> str:
        """RSD convention actually used: 'keep-rsd' unless the data were reconstructed."""
        return self.recon_convention if self.reconstructed else "keep-rsd"

    @property
    def interloper_term(self) -> bool:
        """Whether the model has the line-interloper term (both lines given)."""
        return bool(self.target_line and self.interloper_line)

    @property
    def fit_ells(self) -> tuple[int, ...]:
        """Multipoles fitted: ``ells`` (anisotropic) or the monopole alone (isotropic)."""
        return (0,) if self.analysis == "isotropic" else self.ells

    @property
    def n_sampled_parameters(self) -> int:
        """Number of sampled (non-linear) parameters: dilations, B, and beta and the damping
        scales when their priors are free (the order of ``Likelihood.names``)."""
        n = 1 if self.analysis == "isotropic" else 2
        n += 1  # B
        if self.analysis == "anisotropic" and self.beta_prior_width > 0:
            n += 1
        if self.sigma_prior_width > 0:
            n += 2
        if self.interloper_term:
            n += 1 + (self.interloper_bias_width > 0)
        return n

    @property
    def n_fit_parameters(self) -> int:
        """Every fitted parameter, sampled and broadband (for the Percival et al. 2014 factor)."""
        return self.n_sampled_parameters + len(self.broadband_powers) * len(self.fit_ells)

    @property
    def damping(self) -> tuple[float, float]:
        """(Sigma_par, Sigma_perp) in Mpc/h after applying the reconstruction defaults."""
        default = POST_RECON_DAMPING if self.reconstructed else PRE_RECON_DAMPING
        par = default[0] if self.sigma_par is None else float(self.sigma_par)
        perp = default[1] if self.sigma_perp is None else float(self.sigma_perp)
        return par, perp

    def to_dict(self) -> dict:
        """Plain JSON-ready dict of every field."""
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            out[f.name] = list(v) if isinstance(v, tuple) else v
        return out

    def model_hash(self) -> str:
        """Hash of the settings that change the posterior (not the run length)."""
        d = {k: v for k, v in fingerprint_values(self).items() if k not in _RUN_LENGTH_KEYS}
        return hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()[:16]
