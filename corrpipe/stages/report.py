"""Stage ``report``: summary.json, summary.txt and plots of one analysis (``[report]``)."""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass

import h5py

from corrpipe.settings import setting
from corrpipe.stages.base import Stage, StageContext

__all__ = ["ReportSettings", "STAGE", "TABLES"]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ReportSettings:
    """Config table ``[report]``: plots and summary."""

    plots: bool = setting(True, "write PNG plots of the multipoles, residuals and posteriors")
    dpi: int = setting(120, "resolution of the PNG plots", low=30, high=600)


def compute(ctx: StageContext):
    """summary.json, summary.txt and plots of one analysis (``[report]``)."""
    from corrpipe.checkpoint import write_json_atomic, write_text_atomic
    from corrpipe.fit import FitResult

    a = ctx.analysis
    with ctx.read("fit") as h5:
        result = FitResult.from_hdf5(h5["fit"])
    with ctx.read("randoms") as h5:
        geometry = {k: (v.item() if hasattr(v, "item") else v) for k, v in h5.attrs.items()
                    if k in ("n_data", "n_randoms", "area_deg2", "outside_fraction", "kind",
                             "n_regions", "box_size")}
    summary = result.to_dict()
    summary["sample"] = geometry
    summary["config"] = str(ctx.config.path) if ctx.config.path else ""
    write_json_atomic(ctx.folder / "summary.json", summary)
    text = result.text_summary()
    write_text_atomic(ctx.folder / "summary.txt", text + "\n")
    plots = []
    if a.report.plots:
        plots = _write_plots(ctx, result)

    def fill(h5: h5py.File) -> None:
        h5.attrs["summary_json"] = json.dumps(summary, default=str)
        h5.attrs["plots"] = json.dumps([str(p) for p in plots])

    return fill


def _write_plots(ctx: StageContext, result) -> list:
    from corrpipe.checkpoint import atomic_path
    from corrpipe.fit.plots import plot_multipoles, plot_posterior

    written = []
    for name, make in (("multipoles.png", plot_multipoles), ("posterior.png", plot_posterior)):
        fig = make(result)
        path = ctx.folder / "report" / name
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=ctx.analysis.report.dpi, bbox_inches="tight", format="png")
        written.append(path)
    return written


TABLES = {"report": ReportSettings}

STAGE = Stage("report", ("report",), ("fit", "randoms"), compute)
