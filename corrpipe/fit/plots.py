"""Figures of a fit: data multipoles with the best-fit model and residuals; alpha posterior.

Functions build :class:`matplotlib.figure.Figure` objects without pyplot, so they work
headless and never change global matplotlib state; save them with ``fig.savefig(path)``.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from corrpipe.fit.result import FitResult, dilations_from_samples

__all__ = ["plot_multipoles", "plot_posterior"]


def plot_multipoles(result: FitResult) -> Figure:
    """s^2 xi_ell(s) data with 1-sigma errors and the best-fit model, residuals below.

    Parameters
    ----------
    result : FitResult
        A fit (its ``data`` holds s, ells, data vector, errors and models).

    Returns
    -------
    matplotlib.figure.Figure
    """
    d = result.data
    s = np.asarray(d["s"])
    ells = [int(e) for e in np.atleast_1d(d["ells"])]
    n = s.size
    fig = Figure(figsize=(4.2 * len(ells), 5.0), layout="constrained")
    axes = fig.subplots(2, len(ells), sharex=True, squeeze=False,
                        gridspec_kw={"height_ratios": [3, 1]})
    for i, ell in enumerate(ells):
        sl = slice(i * n, (i + 1) * n)
        data, err = np.asarray(d["data_vector"])[sl], np.asarray(d["errors"])[sl]
        model = np.asarray(d["model"])[sl]
        top, bottom = axes[0, i], axes[1, i]
        top.errorbar(s, s**2 * data, s**2 * err, fmt="o", ms=3, color="k", label="data")
        top.plot(s, s**2 * model, color="C3", label="best fit")
        top.set_ylabel(rf"$s^2\xi_{ell}(s)$ [$h^{{-2}}$Mpc$^2$]")
        bottom.axhline(0.0, color="0.6", lw=0.8)
        bottom.plot(s, (data - model) / err, "o", ms=3, color="k")
        bottom.set_ylabel(r"(data $-$ model)/$\sigma$")
        bottom.set_xlabel(r"$s$ [$h^{-1}$Mpc]")
        if i == 0:
            top.legend(frameon=False)
    fig.suptitle(f"{result.name}: z = {result.z_eff:.3f}, "
                 rf"$\chi^2$ = {result.chi2:.1f}/{result.dof}")
    return fig


def plot_posterior(result: FitResult) -> Figure:
    """Corner plot of the dilations (alpha_par, alpha_perp; or alpha) using the corner package."""
    import corner

    samples = result.samples()
    dil = dilations_from_samples(tuple(result.names), samples)
    keys = ("alpha",) if result.analysis == "isotropic" else ("alpha_par", "alpha_perp")
    labels = {"alpha": r"$\alpha$", "alpha_par": r"$\alpha_\parallel$",
              "alpha_perp": r"$\alpha_\perp$"}
    stacked = np.column_stack([dil[k] for k in keys])
    fig = Figure(figsize=(3.0 * len(keys) + 1, 3.0 * len(keys) + 1))
    corner.corner(stacked, labels=[labels[k] for k in keys], fig=fig,
                  quantiles=[0.16, 0.5, 0.84], show_titles=True, title_fmt=".4f")
    return fig
