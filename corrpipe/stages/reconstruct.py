"""Stage ``reconstruct`` (optional): shift data and randoms by the Zel'dovich displacement
(``[reconstruct]``)."""

from __future__ import annotations

import logging

import h5py

from corrpipe.errors import StageError
from corrpipe.recon.settings import ReconSettings
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import cosmology_of, read_catalogue

__all__ = ["STAGE", "TABLES"]

log = logging.getLogger(__name__)


def compute(ctx: StageContext):
    """Shift data and randoms by the Zel'dovich displacement (``[reconstruct]``)."""
    from corrpipe import recon
    from corrpipe.survey.regions import cube_regions

    a = ctx.analysis
    rs = a.reconstruct
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    with ctx.read("randoms") as h5:
        dw = h5["data/weights"][()]
        z_eff = float(h5.attrs["z_eff"])
        has_r = "randoms" in h5
        if has_r:
            rpos, rw = h5["randoms/positions"][()], h5["randoms/weights"][()]
            r_reg = h5["randoms/regions"][()] if "randoms/regions" in h5 else None
        n_regions = int(h5.attrs["n_regions"])
    f = recon.resolve_growth_rate(rs, cosmology_of(a), z_eff)
    workers = ctx.config.run.threads or None
    s_reg = None
    if data.is_box:
        result = recon.reconstruct_box(data.positions, dw, float(data.box_size),
                                       los_axis=data.los_axis, growth_rate=f, bias=rs.bias,
                                       settings=rs, seed=ctx.seed("shifted-randoms"),
                                       progress=ctx.show_progress, workers=workers)
        if n_regions:
            s_reg = cube_regions(result.random_positions, float(data.box_size),
                                 a.covariance.cubes_per_side)
    else:
        if not has_r:
            raise StageError("reconstruction of a survey needs randoms; the randoms stage "
                             "stored none")
        result = recon.reconstruct_survey(data.positions, dw, rpos, rw, growth_rate=f,
                                          bias=rs.bias, settings=rs,
                                          progress=ctx.show_progress, workers=workers)
        s_reg = r_reg  # shifted randoms keep the labels of the randoms they came from
    log.info("[%s] reconstruct: f = %.3f, b = %.2f, %d iteration(s), residual %.2e",
             a.name, f, rs.bias, result.iterations, result.residual)

    def fill(h5: h5py.File) -> None:
        result.to_hdf5(h5.create_group("reconstruction"))
        if s_reg is not None:
            h5.create_dataset("shifted_random_regions", data=s_reg)
        h5.attrs["growth_rate"] = f

    return fill


TABLES = {"reconstruct": ReconSettings}

STAGE = Stage("reconstruct", ("reconstruct",), ("load", "randoms"), compute,
              enabled=lambda a: a.reconstruct.enabled,
              extra=lambda a: {"covariance.cubes_per_side": a.covariance.cubes_per_side})
