"""Stage ``covariance``: covariance of the multipole vector — jackknife, mocks or Gaussian
analytic (``[covariance]``). The full vector is stored; the fit selects its range from it."""

from __future__ import annotations

import dataclasses
import logging

import h5py
import numpy as np

from corrpipe.covariance import CovarianceSettings
from corrpipe.errors import StageError
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import cosmology_of, read_catalogue
from corrpipe.stages.counts import PairCounter, binnings, line_of_sight, read_counts
from corrpipe.stages.randoms import local_selection

__all__ = ["STAGE", "TABLES"]

log = logging.getLogger(__name__)


def _mock_vectors(ctx: StageContext, files: list[str]) -> np.ndarray:
    """Multipole vectors of mock catalogues through the same counts as the data.

    Each mock is loaded with the data's ``[catalogue]`` settings (only the path differs), gets
    the data's FKP weighting (n(z) of the data; with a per-class selection on a field
    footprint, the n(z) of each object's depth class), and is counted against the data's randoms;
    the RR counts are shared (common practice when the mocks follow the data's footprint and
    n(z)).
    """
    from corrpipe.estimators import estimate_from_counts
    from corrpipe.survey.catalog import load_catalogue
    from corrpipe.survey.field_table import field_footprint_from_settings
    from corrpipe.survey.selection import ClassDensities, local_fkp_weights
    from corrpipe.survey.weights import RedshiftDensity, combine_fkp

    a = ctx.analysis
    cosmo = cosmology_of(a)
    with ctx.read("counts") as h5:
        rr = read_counts(h5, "smu")["RR"]
    with ctx.read("randoms") as h5:
        has_r = "randoms" in h5
        if has_r:
            rpos, rw = h5["randoms/positions"][()], h5["randoms/weights"][()]
        nz = RedshiftDensity.from_hdf5_group(h5["nz"]) if "nz" in h5 else None
        local = a.weights.fkp and local_selection(a) and "nz_classes" in h5
        nz_classes = ClassDensities.from_hdf5_group(h5["nz_classes"]) if local else None
    footprint = field_footprint_from_settings(a.footprint) if local else None
    binning = binnings(a)["smu"]
    vectors = []
    with PairCounter(ctx, None, a.counts.line_of_sight, 0) as counter:
        for i, path in enumerate(files):
            mock = load_catalogue(dataclasses.replace(a.catalogue, path=path), cosmo)
            w = mock.weights
            if local:
                classes = footprint.depth_class_of(mock.ra, mock.dec)
                w = local_fkp_weights(w, mock.z, classes, nz_classes, nz, a.weights.fkp_p0,
                                      a.weights.nz_interpolation)
            elif nz is not None and a.weights.fkp:
                w = combine_fkp(w, mock.z, nz, a.weights.fkp_p0, a.weights.nz_interpolation)
            counter.box_size = mock.box_size
            counter.los = line_of_sight(a, mock.los_axis)
            counts = {"DD": counter(f"mock{i}-DD", binning, mock.positions, w, None),
                      "RR": rr}
            if has_r:
                counts["DR"] = counter(f"mock{i}-DR", binning, mock.positions, w, None,
                                       rpos, rw, None)
            elif mock.box_size is not None:
                from corrpipe.paircount import analytic_box_rr

                counts["RR"] = analytic_box_rr(binning, float(mock.box_size), n=int(w.size),
                                               sum_w=float(w.sum()),
                                               sum_w_sq=float(np.sum(w**2)))
            vectors.append(estimate_from_counts(counts, a.estimate).vector("multipoles"))
    return np.array(vectors)


def compute(ctx: StageContext):
    """Covariance of the multipole vector: jackknife, mocks or Gaussian analytic
    (``[covariance]``). The full vector is stored; the fit selects its range from it."""
    from corrpipe import covariance as cv

    a = ctx.analysis
    c = a.covariance
    samples = None
    if c.kind == "jackknife":
        with ctx.read("counts") as h5:
            smu = read_counts(h5, "smu")
        if smu["DD"].n_regions < 2:
            raise StageError("covariance.kind = 'jackknife' needs jackknife regions in the "
                             "counts; for a periodic box set [counts] box_rr = 'randoms'")
        result = cv.jackknife_from_counts(smu, a.estimate, c, progress=ctx.show_progress,
                                          check=False)
    elif c.kind == "mocks":
        files = cv.expand_mock_paths(c.mocks)
        samples = _mock_vectors(ctx, files)
        result = cv.mock_covariance(samples)
    else:
        result = _analytic_covariance(ctx)
    log.info("[%s] covariance: %s from %d samples, %d bins", a.name, result.kind,
             result.n_samples, result.n_bins)

    def fill(h5: h5py.File) -> None:
        result.to_hdf5_group(h5.create_group("covariance"))
        if samples is not None:
            h5.create_dataset("samples", data=samples)

    return fill


def _analytic_covariance(ctx: StageContext):
    from corrpipe import covariance as cv
    from corrpipe.fit.run import build_linear_power

    a = ctx.analysis
    c = a.covariance
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    if not data.is_box:
        raise StageError("covariance.kind = 'analytic' is the Gaussian covariance of a periodic "
                         "box; for a survey use 'jackknife' or 'mocks'")
    with ctx.read("estimate") as h5:
        s_edges = h5["estimate/s_edges"][()]
    if c.pk_file:
        table = np.loadtxt(c.pk_file)
        pk = (table[:, 0], table[:, 1])
    else:
        # galaxy power: linear matter power at the box redshift times b^2
        lp = build_linear_power(cosmology_of(a), float(a.catalogue.box_redshift), a.fit)
        bias2 = c.bias**2
        pk = lambda k: bias2 * lp(k)  # noqa: E731
    nbar = float(data.size) / float(data.box_size) ** 3
    return cv.gaussian_box_covariance(pk, nbar, float(data.box_size) ** 3, s_edges,
                                      a.estimate.ells, beta=c.beta, k_max=c.k_max)


def _mock_inputs(a) -> list:
    if a.covariance.kind != "mocks":
        return []
    from corrpipe.covariance import expand_mock_paths

    return expand_mock_paths(a.covariance.mocks)


TABLES = {"covariance": CovarianceSettings}

STAGE = Stage("covariance", ("covariance",), ("load", "randoms", "counts", "estimate"), compute,
              extra=lambda a: {"fit-template-for-analytic": a.section_dict("fit")
                               if a.covariance.kind == "analytic" else None},
              inputs=lambda a: _mock_inputs(a))
