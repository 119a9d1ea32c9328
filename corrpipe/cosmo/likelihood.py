"""Likelihood of BAO distance ratios given an expansion history.

Gaussian: chi^2 = r^T C^{-1} r with r = data - model over the whole data vector (bins and
external measurements, cross-covariances included). Chain density (optional, per analysed
bin): -2 ln of the density of the bin's stored posterior samples at the model's distances
(:mod:`corrpipe.cosmo.density`) replaces that bin's Gaussian term. Gaussian priors add their
squared residuals; flat priors bound the parameters.
"""

from __future__ import annotations

from typing import Mapping

import numpy as np

from corrpipe.cosmo.data import DataVector
from corrpipe.cosmo.density import SampleDensity
from corrpipe.cosmo.priors import ParameterSpace
from corrpipe.errors import InputError

__all__ = ["DistanceLikelihood"]


class DistanceLikelihood:
    """ln posterior of the sampled parameters given a data vector.

    Parameters
    ----------
    space : ParameterSpace
        Sampled parameters, flat bounds and Gaussian priors.
    data : DataVector
    densities : mapping, optional
        ``label -> SampleDensity`` for bins whose likelihood is their sample density (in the
        order of the bin's quantities in ``data``). Such bins must have no cross-covariance
        with the rest of the data.
    """

    def __init__(self, space: ParameterSpace, data: DataVector,
                 densities: Mapping[str, SampleDensity] | None = None):
        self.space = space
        self.data = data
        z_unique = np.unique(data.z)
        self.grid = space.model.grid(z_unique)
        self._z_index = np.searchsorted(z_unique, data.z)
        n_z = z_unique.size
        row = {"DM_over_rd": 0, "DH_over_rd": 1, "DV_over_rd": 2}
        self._flat_index = np.array([row[m.quantity] * n_z + i for m, i in
                                     zip(data.measurements, self._z_index)], dtype=int)
        self.densities = dict(densities or {})
        labels = [m.label for m in data.measurements]
        in_density = np.array([lb in self.densities for lb in labels], dtype=bool)
        if in_density.any():
            off = data.covariance[np.ix_(in_density, ~in_density)]
            if np.any(off != 0):
                raise InputError("the chain-density likelihood treats each bin as independent, "
                                 "but the data vector has cross-covariances with them; use "
                                 "likelihood = 'gaussian' with cross-covariances")
        self._gauss = np.flatnonzero(~in_density)
        self._density_rows = {lb: np.flatnonzero(np.array(labels) == lb)
                              for lb in self.densities}
        cov = data.covariance[np.ix_(self._gauss, self._gauss)]
        # whitening matrices W = L^{-1} (C = L L^T), so chi^2 = |W r|^2
        self._white = (np.linalg.inv(np.linalg.cholesky(cov)) if self._gauss.size else None)
        self._white_full = np.linalg.inv(np.linalg.cholesky(data.covariance))

    def with_values(self, values: np.ndarray) -> "DistanceLikelihood":
        """The same likelihood for other measured values (same redshifts and covariance);
        cheap, for simulated data sets and forecasts. Gaussian part only."""
        import copy
        import dataclasses

        if self.densities:
            raise InputError("with_values: only for Gaussian likelihoods")
        values = np.asarray(values, dtype=float)
        ms = tuple(dataclasses.replace(m, value=float(v))
                   for m, v in zip(self.data.measurements, values))
        out = copy.copy(self)
        out.data = dataclasses.replace(self.data, measurements=ms)
        return out

    @property
    def names(self) -> tuple[str, ...]:
        """Sampled parameter names."""
        return self.space.names

    @property
    def n_dim(self) -> int:
        """Number of sampled parameters."""
        return self.space.n_dim

    @property
    def dof(self) -> int:
        """Degrees of freedom: measured numbers + Gaussian priors - sampled parameters."""
        return int(self.data.n + self.space.n_gaussian - self.space.n_dim)

    def predict(self, theta: np.ndarray) -> np.ndarray:
        """Model value of every measurement, shape (n,); NaN for an unphysical history."""
        return self.predict_physical(self.space.physical(theta))

    def predict_physical(self, p: Mapping[str, float]) -> np.ndarray:
        """Model value of every measurement for physical parameters ``p``."""
        r = self.grid.over_rd(p)
        table = np.concatenate([r["DM_over_rd"], r["DH_over_rd"], r["DV_over_rd"]])
        return table[self._flat_index]

    def residuals(self, theta: np.ndarray) -> np.ndarray:
        """Whitened residuals of the Gaussian likelihood (all data) and of the priors."""
        p = self.space.physical(theta)
        r = self.data.values - self.predict_physical(p)
        white = self._white_full @ r
        return np.concatenate([white, self.space.prior_residuals(p)])

    def chi2(self, theta: np.ndarray) -> float:
        """Gaussian chi^2 of the data vector (priors excluded)."""
        p = self.space.physical(theta)
        r = self.data.values - self.predict_physical(p)
        white = self._white_full @ r
        return float(white @ white)

    def log_posterior_many(self, thetas: np.ndarray) -> np.ndarray:
        """:meth:`log_posterior` of an (n, n_dim) array of points at once (for emcee)."""
        thetas = np.atleast_2d(np.asarray(thetas, dtype=float))
        out = np.full(thetas.shape[0], -np.inf)
        ok = np.all((thetas >= self.space.low) & (thetas <= self.space.high), axis=1)
        if not ok.any():
            return out
        p = self.space.physical_many(thetas[ok])
        table = self.grid.over_rd_many(p).reshape(int(ok.sum()), -1)
        model = table[:, self._flat_index]
        total = -0.5 * self.space.prior_chi2_many(p)
        if self._gauss.size:
            white = (self.data.values[self._gauss] - model[:, self._gauss]) @ self._white.T
            total -= 0.5 * np.einsum("ij,ij->i", white, white)
        for label, dens in self.densities.items():
            total += dens.log_density_many(model[:, self._density_rows[label]])
        total = np.where(np.all(np.isfinite(model), axis=1), total, -np.inf)
        out[ok] = total
        return out

    def log_posterior(self, theta: np.ndarray) -> float:
        """ln posterior up to a constant (-inf outside the flat bounds or unphysical)."""
        theta = np.asarray(theta, dtype=float)
        if not self.space.inside(theta):
            return -np.inf
        p = self.space.physical(theta)
        model = self.predict_physical(p)
        if not np.all(np.isfinite(model)):
            return -np.inf
        total = 0.0
        if self._gauss.size:
            r = self.data.values[self._gauss] - model[self._gauss]
            white = self._white @ r
            total -= 0.5 * float(white @ white)
        for label, dens in self.densities.items():
            total += dens.log_density(model[self._density_rows[label]])
        pr = self.space.prior_residuals(p)
        return total - 0.5 * float(pr @ pr)
