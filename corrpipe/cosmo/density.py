"""The exact per-bin likelihood: the density of a bin's stored posterior samples.

A weak BAO detection gives a skewed, prior-bounded (alpha_par, alpha_perp) posterior that a
mean and a 2x2 covariance describe poorly. Because the BAO fit's priors on the dilations are
flat, that posterior is proportional to the bin's likelihood inside the prior; mapped to
distance ratios (a linear map, constant Jacobian) it is the likelihood of (D_M/r_d, D_H/r_d).

Method: a Gaussian kernel density estimate of the samples (scipy.stats.gaussian_kde, Scott's
bandwidth) is evaluated once on a regular grid spanning the samples plus three bandwidths;
its logarithm is then interpolated linearly (scipy RegularGridInterpolator), so a
likelihood call costs a table look-up. Outside the grid the log density falls off as a
Gaussian of the samples' covariance from the grid edge, so a sampler is pushed back towards
the data rather than seeing a cliff.
"""

from __future__ import annotations

import numpy as np

from corrpipe.errors import InputError

__all__ = ["SampleDensity"]


class SampleDensity:
    """Log density of samples in 1 or 2 dimensions, tabulated for fast evaluation.

    Parameters
    ----------
    samples : ndarray, shape (n_samples, n_dim)
        n_dim = 1 (D_V/r_d) or 2 (D_M/r_d, D_H/r_d).
    n_grid : int
        Grid points per dimension.
    max_samples : int
        Samples used for the kernel density (a regular subset of longer chains).
    """

    def __init__(self, samples: np.ndarray, n_grid: int = 96, max_samples: int = 6000):
        from scipy.interpolate import RegularGridInterpolator
        from scipy.stats import gaussian_kde

        x = np.atleast_2d(np.asarray(samples, dtype=float))
        if x.shape[0] < x.shape[1]:
            x = x.T
        n, d = x.shape
        if d not in (1, 2):
            raise InputError(f"sample density: {d} dimensions; only 1 or 2 are supported")
        if n < 50:
            raise InputError(f"sample density: only {n} posterior samples; the chain-density "
                             "likelihood needs at least 50 (run the BAO fit longer)")
        if n > max_samples:
            x = x[np.linspace(0, n - 1, max_samples).astype(int)]
        kde = gaussian_kde(x.T)
        width = np.sqrt(np.diag(kde.covariance))
        self.mean = x.mean(axis=0)
        cov = np.atleast_2d(np.cov(x, rowvar=False))
        self._precision = np.linalg.inv(cov)
        axes = [np.linspace(x[:, k].min() - 3 * width[k], x[:, k].max() + 3 * width[k], n_grid)
                for k in range(d)]
        mesh = np.meshgrid(*axes, indexing="ij")
        points = np.vstack([m.ravel() for m in mesh])
        dens = kde(points).reshape(mesh[0].shape)
        floor = dens.max() * 1e-12
        log_d = np.log(np.maximum(dens, floor))
        self.log_peak = float(log_d.max())
        self._axes = axes
        self._lo = np.array([a[0] for a in axes])
        self._hi = np.array([a[-1] for a in axes])
        self._interp = RegularGridInterpolator(axes, log_d - self.log_peak, method="linear")
        self.dim = d

    def log_density_many(self, values: np.ndarray) -> np.ndarray:
        """:meth:`log_density` of an (n, n_dim) array of points (NaN rows give NaN)."""
        v = np.atleast_2d(np.asarray(values, dtype=float))
        finite = np.all(np.isfinite(v), axis=1)
        v = np.where(finite[:, None], v, self.mean[None, :])
        inside = np.clip(v, self._lo, self._hi)
        r = v - inside
        out = self._interp(inside) - 0.5 * np.einsum("ij,jk,ik->i", r, self._precision, r)
        return np.where(finite, out, np.nan)

    def log_density(self, values: np.ndarray) -> float:
        """ln density at ``values`` (shape (n_dim,)) relative to its peak (0 at the peak)."""
        v = np.asarray(values, dtype=float)
        inside = np.clip(v, self._lo, self._hi)
        out = float(self._interp(inside[None, :])[0])
        if np.any(inside != v):
            r = v - inside
            out -= 0.5 * float(r @ self._precision @ r)
        return out
