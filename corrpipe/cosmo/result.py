"""The outcome of an expansion-history fit: chain, constraints, best fit, Fisher errors."""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import h5py
import numpy as np

from corrpipe.errors import CheckpointError
from corrpipe.fit.result import json_ready as _clean

__all__ = ["CosmologyResult", "interval_summary", "SCHEMA_VERSION"]

SCHEMA_VERSION = 1


def interval_summary(values: np.ndarray) -> dict:
    """Median, mean, std and the equal-tailed 68 % and 95 % intervals of samples."""
    p = np.percentile(values, [2.5, 16.0, 50.0, 84.0, 97.5])
    return {"median": float(p[2]), "mean": float(np.mean(values)), "std": float(np.std(values)),
            "interval_68": [float(p[1]), float(p[3])], "interval_95": [float(p[0]), float(p[4])],
            "error_minus": float(p[2] - p[1]), "error_plus": float(p[3] - p[2])}


@dataclass
class CosmologyResult:
    """Everything the fit produced; :meth:`to_dict` is ``constraints.json``.

    Attributes
    ----------
    model : str
        Model label (e.g. ``"w0wacdm + Omega_k"``).
    names : tuple of str
        Sampled parameters (chain columns).
    chain, log_prob : ndarray
        (n_steps, n_walkers, n_dim) and (n_steps, n_walkers).
    burn, thin : int
    constraints : dict
        Per sampled and derived parameter: :func:`interval_summary` plus ``fisher_error``
        (sampled ones) and ``prior_bounded`` (posterior piled against a flat bound).
    best_fit : dict
        Maximum-posterior sampled and derived parameters.
    chi2, dof : float, int
        Gaussian chi^2 of the data vector at the best fit; dof = measured numbers + Gaussian
        priors - sampled parameters.
    figure_of_merit : dict or None
        w0-wa models: ``mcmc`` and ``fisher`` DETF figures of merit.
    data : list of dict
        The data vector (label, z, quantity, value, error, origin).
    convergence : dict
    likelihood : str
        ``"gaussian"`` or ``"chain-density"``.
    notes : list of str
    """

    model: str
    names: tuple
    chain: np.ndarray
    log_prob: np.ndarray
    burn: int
    thin: int
    constraints: dict
    best_fit: dict
    chi2: float
    dof: int
    figure_of_merit: dict | None
    data: list
    convergence: dict
    likelihood: str = "gaussian"
    fisher_covariance: np.ndarray | None = None
    notes: list = field(default_factory=list)
    priors: dict = field(default_factory=dict)

    def samples(self) -> np.ndarray:
        """Flat samples after burn-in and thinning, shape (n_samples, n_dim)."""
        kept = self.chain[self.burn::self.thin]
        if kept.shape[0] == 0:
            kept = self.chain[-1:]
        return kept.reshape(-1, self.chain.shape[2])

    @property
    def converged(self) -> bool:
        """True if the chain met the autocorrelation stopping rule."""
        return bool(self.convergence.get("converged", False))

    def to_dict(self) -> dict:
        """``constraints.json`` (no chain)."""
        return _clean({"model": self.model, "parameters": list(self.names),
                       "likelihood": self.likelihood, "constraints": self.constraints,
                       "best_fit": self.best_fit, "chi2": self.chi2, "dof": self.dof,
                       "figure_of_merit_w0_wa": self.figure_of_merit, "priors": self.priors,
                       "data": self.data, "convergence": self.convergence,
                       "fisher_covariance": self.fisher_covariance, "notes": self.notes,
                       "schema_version": SCHEMA_VERSION})

    def to_hdf5(self, group: h5py.Group) -> None:
        """Write chain, log-probabilities and the JSON summary into an HDF5 group."""
        group.attrs["schema_version"] = SCHEMA_VERSION
        group.attrs["constraints_json"] = json.dumps(self.to_dict())
        group.attrs["burn"] = self.burn
        group.attrs["thin"] = self.thin
        group.create_dataset("chain", data=self.chain)
        group.create_dataset("log_prob", data=self.log_prob)

    @classmethod
    def from_hdf5(cls, group: h5py.Group) -> "CosmologyResult":
        """Read back what :meth:`to_hdf5` wrote."""
        try:
            if int(group.attrs["schema_version"]) != SCHEMA_VERSION:
                raise CheckpointError(f"cosmology result in {group.file.filename} has schema "
                                      f"version {group.attrs['schema_version']}; this corrpipe "
                                      f"reads {SCHEMA_VERSION}; rerun the cosmology stage")
            d = json.loads(group.attrs["constraints_json"])
            fc = d.get("fisher_covariance")
            return cls(model=d["model"], names=tuple(d["parameters"]),
                       chain=group["chain"][()], log_prob=group["log_prob"][()],
                       burn=int(group.attrs["burn"]), thin=int(group.attrs["thin"]),
                       constraints=d["constraints"], best_fit=d["best_fit"], chi2=d["chi2"],
                       dof=d["dof"], figure_of_merit=d["figure_of_merit_w0_wa"],
                       data=d["data"], convergence=d["convergence"],
                       likelihood=d["likelihood"],
                       fisher_covariance=None if fc is None else np.array(fc, dtype=float),
                       notes=d.get("notes", []), priors=d.get("priors", {}))
        except KeyError as exc:
            raise CheckpointError(f"cosmology result in {group.file.filename} is incomplete "
                                  f"(missing {exc}); rerun the cosmology stage") from exc

    def text_summary(self) -> str:
        """A few lines for the terminal."""
        lines = [f"expansion history: {self.model}, {len(self.data)} measured numbers, "
                 f"{self.likelihood} likelihood; chi2 = {self.chi2:.2f} / {self.dof} dof"]
        for name, c in self.constraints.items():
            fe = c.get("fisher_error")
            extra = f"   (Fisher +-{fe:.4g})" if fe is not None else ""
            flag = "   [prior-bounded]" if c.get("prior_bounded") else ""
            lo95, hi95 = c["interval_95"]
            lines.append(f"  {name:8s} = {c['median']:.4g} +{c['error_plus']:.3g} "
                         f"-{c['error_minus']:.3g}  (95%: {lo95:.4g} .. {hi95:.4g}){extra}{flag}")
        if self.figure_of_merit:
            fom = self.figure_of_merit
            lines.append(f"  w0-wa figure of merit: {fom.get('mcmc') or float('nan'):.1f} "
                         f"(Fisher {fom.get('fisher') or float('nan'):.1f})")
        for note in self.notes:
            lines.append(f"  NOTE: {note}")
        if not self.converged:
            lines.append(f"  WARNING: {self.convergence.get('note', 'chain not converged')}")
        return "\n".join(lines)
