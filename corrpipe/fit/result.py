"""The outcome of a BAO fit: chain, best fit, summary statistics and distances."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import h5py
import numpy as np

from corrpipe.errors import CheckpointError

__all__ = ["FitResult", "dilations_from_samples", "summarise_samples", "json_ready",
           "SCHEMA_VERSION"]

SCHEMA_VERSION = 1


def dilations_from_samples(names: tuple[str, ...], samples: np.ndarray) -> dict[str, np.ndarray]:
    """alpha_par, alpha_perp, alpha (iso) and epsilon for each sample of either parametrisation.

    Notes
    -----
    Xu et al. 2013, MNRAS 431, 2834 (REFERENCES §7): alpha = alpha_par^(1/3) alpha_perp^(2/3),
    1 + epsilon = (alpha_par / alpha_perp)^(1/3); inversely alpha_par = alpha (1 + epsilon)^2,
    alpha_perp = alpha / (1 + epsilon).
    """
    col = {n: samples[:, i] for i, n in enumerate(names)}
    if "alpha_par" in col:
        a_par, a_perp = col["alpha_par"], col["alpha_perp"]
        alpha = np.cbrt(a_par * a_perp**2)
        eps = np.cbrt(a_par / a_perp) - 1.0
    elif "epsilon" in col:
        alpha, eps = col["alpha"], col["epsilon"]
        a_par, a_perp = alpha * (1.0 + eps) ** 2, alpha / (1.0 + eps)
    else:  # isotropic
        alpha = col["alpha"]
        return {"alpha": alpha}
    return {"alpha_par": a_par, "alpha_perp": a_perp, "alpha": alpha, "epsilon": eps}


def summarise_samples(values: np.ndarray, scale: float = 1.0) -> dict:
    """Median, 16th/84th (and 2.5th/97.5th) percentiles and mean of samples, errors scaled
    by ``scale``.

    The spread about the median is multiplied by ``scale`` (sqrt of the Percival et al. 2014
    variance factor m1; 1 for none). ``p16``/``p84`` bound the 68 % interval, ``p025``/``p975``
    the 95 % one.
    """
    p025, p16, med, p84, p975 = np.percentile(values, [2.5, 16.0, 50.0, 84.0, 97.5])
    return {"median": float(med), "p16": float(med - scale * (med - p16)),
            "p84": float(med + scale * (p84 - med)),
            "p025": float(med - scale * (med - p025)), "p975": float(med + scale * (p975 - med)),
            "error_minus": float(scale * (med - p16)), "error_plus": float(scale * (p84 - med)),
            "mean": float(np.mean(values)), "std": float(scale * np.std(values))}


def _to_json(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {str(k): _to_json(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_to_json(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _to_json(obj.tolist())
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    return obj


#: Nested dicts/lists/arrays/numpy scalars -> plain JSON types (non-finite floats -> None).
json_ready = _to_json


@dataclass
class FitResult:
    """Everything a fit produced; ``to_dict`` is the summary.json entry of one analysis.

    Attributes
    ----------
    name : str
        Analysis name.
    analysis : str
        ``"anisotropic"`` or ``"isotropic"``.
    z_eff : float
        Effective redshift of the data.
    names : tuple of str
        Sampled parameters, in chain column order.
    chain, log_prob : ndarray
        Full chain (n_steps, n_walkers, n_dim) and its log posterior (n_steps, n_walkers).
    burn, thin : int
        Steps dropped and thinning used for the summaries.
    best_fit : dict
        Maximum-posterior parameters (sampled and physical), with ``chi2``.
    chi2, dof : float, int
        chi^2 at the best fit and degrees of freedom (bins - broadband terms - parameters).
    summary : dict
        Per quantity (sampled parameters, alphas, epsilon): median, p16, p84, errors.
    distances : dict
        DM_over_rd, DH_over_rd, DV_over_rd: fiducial value and posterior summary.
    convergence : dict
        converged flag, steps, tau, acceptance, note.
    profile : dict or None
        chi^2 profile over alpha_iso (grid, delta chi^2, crossing errors).
    data : dict
        s, ells, data vector, errors, best-fit model (with and without broadband).
    diagnostics : dict
        ``bao_detection`` (chi^2 against a no-BAO template, significance) and
        ``prior_edges`` (posterior mass next to the alpha prior bounds); see
        :func:`corrpipe.fit.run.bao_detection` and :func:`corrpipe.fit.run.prior_edges`.
    """

    name: str
    analysis: str
    z_eff: float
    names: tuple
    chain: np.ndarray
    log_prob: np.ndarray
    burn: int
    thin: int
    best_fit: dict
    chi2: float
    dof: int
    summary: dict
    distances: dict
    fiducial: dict
    convergence: dict
    covariance_type: str = "unknown"
    variance_factor: float = 1.0
    precision_factor: float = 1.0
    correlation_par_perp: float | None = None
    profile: dict | None = None
    settings: dict = field(default_factory=dict)
    data: dict = field(default_factory=dict)
    diagnostics: dict = field(default_factory=dict)

    @property
    def converged(self) -> bool:
        """True if the chain met the autocorrelation stopping rule."""
        return bool(self.convergence.get("converged", False))

    def samples(self) -> np.ndarray:
        """Flat samples after burn-in and thinning, shape (n_samples, n_dim)."""
        kept = self.chain[self.burn::self.thin]
        if kept.shape[0] == 0:
            kept = self.chain[-1:]
        return kept.reshape(-1, self.chain.shape[2])

    def to_dict(self) -> dict:
        """Machine-readable summary (JSON-ready; no chain, no data arrays)."""
        return _to_json({
            "name": self.name,
            "analysis": self.analysis,
            "z_eff": self.z_eff,
            "parameters": list(self.names),
            "summary": self.summary,
            "best_fit": self.best_fit,
            "chi2": self.chi2,
            "dof": self.dof,
            "correlation_alpha_par_alpha_perp": self.correlation_par_perp,
            "distances": self.distances,
            "fiducial": self.fiducial,
            "convergence": self.convergence,
            "alpha_profile": None if self.profile is None else {
                k: v for k, v in self.profile.items() if k not in ("alpha", "delta_chi2")},
            "covariance_type": self.covariance_type,
            "variance_factor_m1": self.variance_factor,
            "precision_factor": self.precision_factor,
            "fit_range": [self.settings.get("s_min"), self.settings.get("s_max")],
            "diagnostics": self.diagnostics,
            "schema_version": SCHEMA_VERSION,
        })

    def to_hdf5(self, group: h5py.Group) -> None:
        """Write into an open HDF5 group (chain, log-probabilities, data, JSON summary)."""
        group.attrs["schema_version"] = SCHEMA_VERSION
        group.attrs["summary_json"] = json.dumps(self.to_dict())
        group.attrs["settings_json"] = json.dumps(_to_json(self.settings))
        group.create_dataset("chain", data=self.chain)
        group.create_dataset("log_prob", data=self.log_prob)
        group.attrs["burn"] = self.burn
        group.attrs["thin"] = self.thin
        data = group.create_group("data")
        for k, v in self.data.items():
            data.create_dataset(k, data=np.asarray(v))
        if self.profile is not None:
            prof = group.create_group("profile")
            prof.create_dataset("alpha", data=np.asarray(self.profile["alpha"]))
            prof.create_dataset("delta_chi2", data=np.asarray(self.profile["delta_chi2"]))

    @classmethod
    def from_hdf5(cls, group: h5py.Group) -> "FitResult":
        """Read back what :meth:`to_hdf5` wrote.

        Raises
        ------
        CheckpointError
            Missing pieces or an unknown schema version.
        """
        try:
            version = int(group.attrs["schema_version"])
            if version != SCHEMA_VERSION:
                raise CheckpointError(f"fit result in {group.file.filename} has schema version "
                                      f"{version}; this corrpipe reads {SCHEMA_VERSION}. Rerun "
                                      "the fit stage")
            d = json.loads(group.attrs["summary_json"])
            settings = json.loads(group.attrs["settings_json"])
            data = {k: group["data"][k][()] for k in group["data"]}
            profile = None
            if "profile" in group:
                profile = dict(d["alpha_profile"] or {})
                profile["alpha"] = group["profile"]["alpha"][()]
                profile["delta_chi2"] = group["profile"]["delta_chi2"][()]
            return cls(name=d["name"], analysis=d["analysis"], z_eff=d["z_eff"],
                       names=tuple(d["parameters"]), chain=group["chain"][()],
                       log_prob=group["log_prob"][()], burn=int(group.attrs["burn"]),
                       thin=int(group.attrs["thin"]), best_fit=d["best_fit"], chi2=d["chi2"],
                       dof=d["dof"], summary=d["summary"], distances=d["distances"],
                       fiducial=d["fiducial"], convergence=d["convergence"],
                       covariance_type=d["covariance_type"],
                       variance_factor=d["variance_factor_m1"],
                       precision_factor=d["precision_factor"],
                       correlation_par_perp=d["correlation_alpha_par_alpha_perp"],
                       profile=profile, settings=settings, data=data,
                       diagnostics=d.get("diagnostics") or {})
        except KeyError as exc:
            raise CheckpointError(f"fit result in {group.file.filename} is incomplete (missing "
                                  f"{exc}); rerun the fit stage") from exc

    def text_summary(self) -> str:
        """A few lines for the end of a run."""
        lines = [f"{self.name}: {self.analysis} BAO fit at z_eff = {self.z_eff:.3f} "
                 f"(chi2 = {self.chi2:.1f} / {self.dof} dof, covariance: "
                 f"{self.covariance_type})"]
        keys = ("alpha",) if self.analysis == "isotropic" else (
            "alpha_par", "alpha_perp", "alpha", "epsilon")
        for k in keys:
            s = self.summary[k]
            lines.append(f"  {k:11s} = {s['median']:.4f} +{s['error_plus']:.4f} "
                         f"-{s['error_minus']:.4f}")
        for k, v in self.distances.items():
            lines.append(f"  {k:11s} = {v['median']:.3f} +{v['error_plus']:.3f} "
                         f"-{v['error_minus']:.3f}   (fiducial {v['fiducial']:.3f})")
        if self.correlation_par_perp is not None:
            lines.append(f"  corr(alpha_par, alpha_perp) = {self.correlation_par_perp:.3f}")
        det = self.diagnostics.get("bao_detection")
        if det:
            lines.append(f"  BAO detection: Delta chi2 = {det['delta_chi2']:.1f} against a "
                         f"no-BAO template ({det['significance_sigma']:.1f} sigma)")
        inter = self.diagnostics.get("interlopers")
        if inter and "interloper_fraction" in self.summary:
            f = self.summary["interloper_fraction"]
            sh = inter["shift"]
            lines.append(f"  interloper fraction = {f['median']:.4f} +{f['error_plus']:.4f} "
                         f"-{f['error_minus']:.4f}; the term moves alpha_par by "
                         f"{sh['alpha_par']:+.4f} and alpha_perp by {sh['alpha_perp']:+.4f} "
                         "(best fits with and without it)")
        for k, v in self.diagnostics.get("prior_edges", {}).items():
            if v["prior_limited"]:
                lo, hi = v["prior"]
                lines.append(f"  NOTE: {100 * v['edge_mass']:.0f}% of the {k} posterior lies "
                             f"next to its prior bounds {lo:g}-{hi:g}; its error depends on "
                             "the prior (weak BAO detection)")
        if not self.converged:
            lines.append(f"  WARNING: {self.convergence.get('note', 'chain not converged')}")
        return "\n".join(lines)
