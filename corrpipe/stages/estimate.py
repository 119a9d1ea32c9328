"""Stage ``estimate``: xi(s, mu), multipoles, wedges [and w_p] from the stored counts
(``[estimate]``)."""

from __future__ import annotations

import logging

import h5py

from corrpipe.estimators import EstimateSettings
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.counts import read_counts

__all__ = ["STAGE", "TABLES"]

log = logging.getLogger(__name__)


def compute(ctx: StageContext):
    """xi(s, mu), multipoles, wedges [and w_p] from the stored counts (``[estimate]``)."""
    from corrpipe.estimators import estimate_from_counts

    a = ctx.analysis
    with ctx.read("counts") as h5:
        smu = read_counts(h5, "smu")
        rppi = read_counts(h5, "rppi") if "rppi" in h5 else None
    with ctx.read("randoms") as h5:
        z_eff = float(h5.attrs["z_eff"])
    est = estimate_from_counts(smu, a.estimate, rppi)

    def fill(h5: h5py.File) -> None:
        est.to_hdf5_group(h5.create_group("estimate"))
        h5.attrs["z_eff"] = z_eff

    return fill


TABLES = {"estimate": EstimateSettings}

STAGE = Stage("estimate", ("estimate",), ("counts", "randoms"), compute)
