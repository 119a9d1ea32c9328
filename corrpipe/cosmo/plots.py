"""Figures of an expansion-history fit: the distance–redshift diagram and the contours.

Built as :class:`matplotlib.figure.Figure` objects without pyplot (headless, no global state).
"""

from __future__ import annotations

from typing import Callable

import numpy as np
from matplotlib.figure import Figure

from corrpipe.cosmo.priors import ParameterSpace
from corrpipe.cosmo.result import CosmologyResult

__all__ = ["plot_distances", "plot_contours", "contour_pair"]

_LABELS = {"DM_over_rd": r"$D_M/r_d$", "DH_over_rd": r"$D_H/r_d$", "DV_over_rd": r"$D_V/r_d$"}
_TEX = {"Omega_m": r"$\Omega_m$", "h_rd": r"$h\,r_d$ [Mpc]", "w": "$w$", "w0": "$w_0$",
        "wa": "$w_a$", "Omega_k": r"$\Omega_k$", "h": "$h$", "omega_b": r"$\omega_b$"}


def plot_distances(result: CosmologyResult, space: ParameterSpace,
                   reference: Callable[[np.ndarray], dict], reference_label: str = "reference",
                   n_models: int = 200, seed: int = 0) -> Figure:
    """D_M/r_d, D_H/r_d and D_V/r_d of every measurement divided by a reference model.

    Parameters
    ----------
    result : CosmologyResult
    space : ParameterSpace
        The fit's parameter space (maps chain samples to models).
    reference : callable
        ``reference(z) -> {"DM_over_rd": ..., "DH_over_rd": ..., "DV_over_rd": ...}``.
    reference_label : str
        Name of the reference model in the axis label.
    n_models : int
        Posterior samples drawn for the 68 % band of the fitted model.

    Returns
    -------
    matplotlib.figure.Figure
    """
    rows = result.data
    z_max = max(r["z"] for r in rows)
    z = np.linspace(0.02, 1.1 * z_max, 120)
    grid = space.model.grid(z)
    ref = reference(z)
    samples = result.samples()
    rng = np.random.default_rng(seed)
    pick = samples[rng.choice(len(samples), size=min(n_models, len(samples)), replace=False)]
    models = [grid.over_rd(space.physical(t)) for t in pick]
    best_theta = np.array([result.best_fit[n] for n in space.names])
    best = grid.over_rd(space.physical(best_theta))
    fig = Figure(figsize=(6.4, 7.2), layout="constrained")
    axes = fig.subplots(3, 1, sharex=True)
    for ax, q in zip(axes, ("DM_over_rd", "DH_over_rd", "DV_over_rd")):
        ratios = np.array([m[q] / ref[q] for m in models])
        lo, hi = np.percentile(ratios, [16, 84], axis=0)
        ax.fill_between(z, lo, hi, color="tab:blue", alpha=0.25, lw=0,
                        label=f"{result.model}: 68 %")
        ax.plot(z, best[q] / ref[q], color="tab:blue", lw=1.2, label="best fit")
        ax.axhline(1.0, color="0.4", lw=0.8, ls="--")
        mine = [r for r in rows if r["quantity"] == q]
        if mine:
            zz = np.array([r["z"] for r in mine])
            r_ref = reference(zz)[q]
            ax.errorbar(zz, [r["value"] for r in mine] / r_ref,
                        yerr=[r["error"] for r in mine] / r_ref, fmt="o", ms=4, capsize=2,
                        color="k")
            for r, x, y in zip(mine, zz, np.array([r["value"] for r in mine]) / r_ref):
                ax.annotate(r["label"], (x, y), xytext=(4, 4), textcoords="offset points",
                            fontsize=7)
        ax.set_ylabel(f"{_LABELS[q]} / {reference_label}")
    axes[0].legend(fontsize=8, loc="best")
    axes[-1].set_xlabel("redshift z")
    return fig


def contour_pair(result: CosmologyResult) -> tuple[str, str]:
    """The two parameters a contour plot shows for the result's model."""
    names = result.names
    if "w0" in names:
        return "w0", "wa"
    if "w" in names:
        return "Omega_m", "w"
    if "Omega_k" in names:
        return "Omega_m", "Omega_k"
    return "Omega_m", "h_rd"


def plot_contours(result: CosmologyResult) -> Figure:
    """68 % and 95 % contours of (w0, wa), (Omega_m, w) or (Omega_m, h r_d), ΛCDM marked.

    The contours enclose 68 % and 95 % of the posterior samples (corner.hist2d, lightly
    smoothed histogram).
    """
    import corner

    x_name, y_name = contour_pair(result)
    s = result.samples()
    x = s[:, result.names.index(x_name)]
    y = s[:, result.names.index(y_name)]
    fig = Figure(figsize=(5.0, 4.4), layout="constrained")
    ax = fig.subplots()
    corner.hist2d(x, y, ax=ax, levels=(0.68, 0.95), smooth=1.0, bins=40,
                  plot_datapoints=False, plot_density=False, fill_contours=True,
                  color="tab:blue")
    if y_name == "wa":
        ax.axvline(-1.0, color="0.4", lw=0.8, ls="--")
        ax.axhline(0.0, color="0.4", lw=0.8, ls="--")
        ax.plot([-1.0], [0.0], marker="*", ms=12, color="tab:red", ls="none", label="ΛCDM")
    elif y_name == "w":
        ax.axhline(-1.0, color="tab:red", lw=1.0, ls="--", label="ΛCDM (w = -1)")
    elif y_name == "Omega_k":
        ax.axhline(0.0, color="tab:red", lw=1.0, ls="--", label="flat")
    ax.plot([result.best_fit[x_name]], [result.best_fit[y_name]], marker="+", ms=10,
            color="k", ls="none", label="best fit")
    ax.set_xlabel(_TEX.get(x_name, x_name))
    ax.set_ylabel(_TEX.get(y_name, y_name))
    ax.set_title(f"{result.model}: 68 % and 95 %", fontsize=10)
    ax.legend(fontsize=8, loc="best")
    return fig
