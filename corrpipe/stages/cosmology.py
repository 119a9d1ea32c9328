"""Batch stage ``cosmology``: expansion-history models fitted to the BAO distances of the
batch's analyses and of external files (``[expansion]``).

Reads each chosen analysis's stored ``fit`` (its chain, mapped to D_M/r_d, D_H/r_d or
D_V/r_d), writes ``cosmology.h5`` (chain and summary), ``constraints.json`` and, with
``plots = true``, ``cosmology/distances.png`` and ``cosmology/contours.png`` in the batch
output folder. The numerics are in :mod:`corrpipe.cosmo`.
"""

from __future__ import annotations

import logging

import h5py

from corrpipe.cosmo.settings import ExpansionSettings
from corrpipe.stages.base import BatchContext, Stage
from corrpipe.stages.common import cosmology_of

__all__ = ["STAGE", "TABLES", "chosen_analyses", "redshift_ranges"]

log = logging.getLogger(__name__)


def chosen_analyses(config) -> list[str]:
    """Names of the analyses the fit reads (``[expansion] analyses``, default all)."""
    settings = config.expansion
    if not settings.use_analyses:
        return []
    known = [a.name for a in config.analyses]
    if settings.analyses:
        from corrpipe.errors import ConfigError

        for name in settings.analyses:
            if name not in known:
                raise ConfigError(f"[expansion] analyses: no analysis '{name}' in the config; "
                                  f"analyses: {', '.join(known)}")
        return list(settings.analyses)
    return known


def redshift_ranges(config, names) -> dict:
    """Redshift cuts [z_min, z_max) of the chosen sky analyses (boxes have none)."""
    out = {}
    for name in names:
        cat = config.analysis(name).catalogue
        if cat.kind == "sky":
            out[name] = (float(cat.z_min), None if cat.z_max is None else float(cat.z_max))
    return out


def compute(ctx: BatchContext):
    """Fit the ``[expansion]`` model to the batch's bins (and external files)."""
    from corrpipe.checkpoint import atomic_path, write_json_atomic, write_text_atomic
    from corrpipe.cosmo.data import bin_from_fit
    from corrpipe.cosmo.run import fit_expansion
    from corrpipe.fit import FitResult

    settings: ExpansionSettings = ctx.config.expansion
    names = chosen_analyses(ctx.config)
    bins = []
    for name in names:
        with ctx.read_analysis(name, "fit") as h5:
            bins.append(bin_from_fit(FitResult.from_hdf5(h5["fit"]), name))
    result = fit_expansion(settings, bins, redshift_ranges(ctx.config, names),
                           progress_path=ctx.progress_path, seed=ctx.seed("chain") % (2**32),
                           progress=ctx.show_progress)
    summary = result.to_dict()
    summary["analyses"] = names
    summary["external"] = list(settings.external)
    write_json_atomic(ctx.folder / "constraints.json", summary)
    write_text_atomic(ctx.folder / "constraints.txt", result.text_summary() + "\n")
    plots = []
    if settings.plots:
        from corrpipe.cosmo.plots import plot_contours, plot_distances

        fiducial = cosmology_of(ctx.config.analyses[0])
        figures = {"distances.png": plot_distances(result, settings.space(),
                                                   fiducial.distance_ratios, "fiducial"),
                   "contours.png": plot_contours(result)}
        for file_name, fig in figures.items():
            path = ctx.folder / "cosmology" / file_name
            with atomic_path(path) as tmp:
                fig.savefig(tmp, dpi=settings.dpi, bbox_inches="tight", format="png")
            plots.append(str(path))
    log.info("cosmology: %s", result.text_summary().replace("\n", "; "))

    def fill(h5: h5py.File) -> None:
        result.to_hdf5(h5.create_group("cosmology"))
        h5.attrs["plots"] = "\n".join(plots)

    return fill


TABLES = {"expansion": ExpansionSettings}

STAGE = Stage("cosmology", ("expansion",), ("fit",), compute, scope="batch",
              inputs=lambda config: [p for p in (*config.expansion.external,
                                                 config.expansion.cross_covariance,
                                                 config.expansion.mock_distances) if p],
              enabled=lambda config: config.expansion.enabled,
              analyses=chosen_analyses)
