"""Stage ``fit``: BAO template fit by MCMC (``[fit]``; template at the ``[cosmology]``
fiducial), and the checks across tables that the fit range needs."""

from __future__ import annotations

import dataclasses
import logging
from typing import Any

import h5py

from corrpipe.errors import ConfigError, StageError
from corrpipe.fit.settings import FitSettings
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import cosmology_of

__all__ = ["STAGE", "TABLES", "fit_settings_of", "fit_inputs", "check_analysis"]

log = logging.getLogger(__name__)


def check_analysis(analysis: Any, where: str) -> None:
    """Checks across tables of one analysis, run when the config is loaded."""
    counts, fit = analysis.counts, analysis.fit
    s_lo, s_hi = getattr(fit, "s_min", None), getattr(fit, "s_max", None)
    if s_lo is not None and s_hi is not None:
        if s_lo < counts.s_min or s_hi > counts.s_max:
            raise ConfigError(
                f"{where}: analysis '{analysis.name}': the fit range [fit] s_min..s_max = "
                f"{s_lo:g}..{s_hi:g} Mpc/h lies outside the counted range [counts] "
                f"s_min..s_max = {counts.s_min:g}..{counts.s_max:g}; widen [counts] or narrow [fit]")


def fit_inputs(a, est, cov, fit, n_params: int) -> dict:
    """Data vector, covariance and the Hartlap/Percival factors for the fit's bins.

    ``n_params`` counts every fitted parameter (sampled and broadband) for the Percival et
    al. (2014) factor m1; the Hartlap et al. (2007) factor uses the number of fitted bins.
    """
    from corrpipe.covariance import hartlap_factor, percival_factors

    s = est.s
    in_range = (s >= fit.s_min) & (s <= fit.s_max)
    n_fit_bins = int(in_range.sum()) * len(fit.fit_ells)
    if cov.kind == "analytic":
        hartlap, m1 = 1.0, 1.0
    else:
        if cov.n_samples <= n_fit_bins + 4:
            raise StageError(
                f"the {cov.kind} covariance has {cov.n_samples} samples but the fit uses "
                f"{n_fit_bins} bins ({len(fit.fit_ells)} multipoles x {int(in_range.sum())} s "
                f"bins); use more {'regions ([covariance] n_regions)' if cov.kind == 'jackknife' else 'mocks'}"
                f" than bins + 4 (Percival et al. 2014), or fewer bins ([estimate] s_merge, a narrower fit range)")
        hartlap = hartlap_factor(cov.n_samples, n_fit_bins)
        m1, _ = percival_factors(cov.n_samples, n_fit_bins, n_params)
    return dict(s=s, data_vector=est.vector("multipoles"), covariance=cov.matrix,
                ells=est.ells, precision_factor=hartlap, variance_factor=m1)


def fit_settings_of(analysis):
    """The ``[fit]`` settings an analysis is fitted with: switched to the post-reconstruction
    model (damping, RSD convention, smoothing) when ``[reconstruct]`` is enabled."""
    settings = analysis.fit
    if analysis.reconstruct.enabled and not settings.reconstructed:
        settings = dataclasses.replace(settings, reconstructed=True,
                                       recon_convention=analysis.reconstruct.convention,
                                       smoothing_radius=analysis.reconstruct.smoothing)
    return settings


def compute(ctx: StageContext):
    """BAO template fit by MCMC (``[fit]``; template at the ``[cosmology]`` fiducial)."""
    from corrpipe.covariance import CovarianceResult
    from corrpipe.estimators import Estimate
    from corrpipe.fit import fit_multipoles

    a = ctx.analysis
    with ctx.read("estimate") as h5:
        est = Estimate.from_hdf5_group(h5["estimate"])
        z_eff = float(h5.attrs["z_eff"])
    with ctx.read("covariance") as h5:
        cov = CovarianceResult.from_hdf5_group(h5["covariance"])
    settings = fit_settings_of(a)
    cosmo = cosmology_of(a)
    inputs = fit_inputs(a, est, cov, settings, settings.n_fit_parameters)
    result = fit_multipoles(cosmology=cosmo, z_eff=z_eff, settings=settings,
                            progress_path=ctx.progress_path, progress=ctx.show_progress,
                            seed=ctx.seed("mcmc") % (2**32), covariance_type=cov.kind,
                            name=a.name, **inputs)

    def fill(h5: h5py.File) -> None:
        result.to_hdf5(h5.create_group("fit"))

    return fill


TABLES = {"fit": FitSettings}

STAGE = Stage("fit", ("fit", "cosmology"), ("estimate", "covariance", "reconstruct"), compute,
              extra=lambda a: {"reconstruct.enabled": a.reconstruct.enabled})
