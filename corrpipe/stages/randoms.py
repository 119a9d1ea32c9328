"""Stage ``randoms``: randoms, n(z), FKP weights and jackknife regions (``[footprint]``,
``[randoms]``, ``[weights]`` and the region keys of ``[covariance]``)."""

from __future__ import annotations

import dataclasses
import logging
from typing import Any

import h5py
import numpy as np

from corrpipe.errors import ConfigError
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import cosmology_of, read_catalogue, write_arrays
from corrpipe.survey.footprint import FootprintSettings
from corrpipe.survey.randoms import RandomsSettings
from corrpipe.survey.regions import RegionSettings
from corrpipe.survey.weights import WeightsSettings

__all__ = ["STAGE", "TABLES", "check_analysis"]

log = logging.getLogger(__name__)


def _box_uses_randoms(a) -> bool:
    return a.counts.box_rr == "randoms"


def compute(ctx: StageContext):
    """Randoms, n(z), FKP weights and jackknife regions (``[footprint]``, ``[randoms]``,
    ``[weights]`` and the region keys of ``[covariance]``)."""
    from corrpipe.cosmology import sky_to_cartesian
    from corrpipe.survey import randoms as rnd
    from corrpipe.survey import regions as reg
    from corrpipe.survey.catalog import load_sky_catalogue
    from corrpipe.survey.field_regions import field_regions
    from corrpipe.survey.field_table import field_footprint_from_settings
    from corrpipe.survey.footprint import check_data_inside, footprint_from_settings
    from corrpipe.survey.selection import class_densities, local_fkp_weights
    from corrpipe.survey.weights import combine_fkp, redshift_density, redshift_edges

    a = ctx.analysis
    cosmo = cosmology_of(a)
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    seed = a.randoms.seed if a.randoms.seed >= 0 else ctx.seed("randoms")
    info: dict[str, Any] = {"seed": int(seed)}
    classes = None

    if data.is_box:
        L = float(data.box_size)
        if _box_uses_randoms(a):
            n_r = int(round(a.randoms.size_factor * data.size))
            rpos = rnd.box_randoms(n_r, L, seed)
            rw = np.ones(n_r)
            subset = np.arange(n_r, dtype=np.int64) % a.randoms.n_sets
            n_side = a.covariance.cubes_per_side
            d_reg = reg.cube_regions(data.positions, L, n_side)
            r_reg = reg.cube_regions(rpos, L, n_side)
            reg.check_regions(n_side**3, data=d_reg, randoms=r_reg)
            n_regions = n_side**3
        else:
            rpos = rw = subset = r_reg = None
            d_reg, n_regions = None, 0
        z_eff = float(a.catalogue.box_redshift)
        dw = data.weights
        info.update(kind="box", box_size=L, n_randoms=0 if rpos is None else len(rw))
        nz = None
    else:
        if a.randoms.file:
            rcat = load_sky_catalogue(a.randoms.file, columns=dict(
                ra=a.catalogue.ra_column, dec=a.catalogue.dec_column,
                z=a.catalogue.redshift_column), weight_columns=(), z_min=a.catalogue.z_min,
                z_max=a.catalogue.z_max, cosmology=cosmo, name="randoms")
            rnd.check_randoms_size(data.size, rcat.size, str(a.randoms.file))
            frac = rnd.outside_random_coverage(data.ra, data.dec, rcat.ra, rcat.dec,
                                               nside=a.randoms.coverage_nside,
                                               warn_above=a.randoms.outside_warn_fraction)
            ra_r, dec_r, z_r, rw = rcat.ra, rcat.dec, rcat.z, rcat.weights
            subset = np.arange(rcat.size, dtype=np.int64) % a.randoms.n_sets
            area_sr = float(_coverage_area(ra_r, dec_r, a.randoms.coverage_nside))
        elif a.footprint.kind == "fields":
            footprint = field_footprint_from_settings(a.footprint)
            frac = check_data_inside(footprint, data.ra, data.dec, data.weights,
                                     warn_above=a.randoms.outside_warn_fraction)
            local = _local_randoms(ctx, footprint, data, seed)
            rcat, r_fields, d_cls, classes = local
            ra_r, dec_r, z_r, rw, subset = rcat.ra, rcat.dec, rcat.z, rcat.weights, rcat.subset
            area_sr = float(footprint.effective_area_sr())
            info.update(n_fields=footprint.n_fields, n_depth_classes=int(classes.n_classes),
                        area_error_sr=footprint.area_error_sr())
        else:
            footprint = footprint_from_settings(a.footprint, data.ra, data.dec)
            frac = check_data_inside(footprint, data.ra, data.dec, data.weights,
                                     warn_above=a.randoms.outside_warn_fraction)
            rcat = rnd.make_randoms(footprint, data.z, data.weights,
                                    size_factor=a.randoms.size_factor,
                                    redshifts=a.randoms.redshifts,
                                    smoothing=a.randoms.smoothing, n_sets=a.randoms.n_sets,
                                    seed=seed, progress=ctx.show_progress,
                                    z_min=a.catalogue.z_min, z_max=a.catalogue.z_max)
            ra_r, dec_r, z_r, rw, subset = rcat.ra, rcat.dec, rcat.z, rcat.weights, rcat.subset
            area_sr = float(footprint.effective_area_sr())
        info.update(kind="sky", outside_fraction=float(frac), area_sr=area_sr,
                    area_deg2=area_sr * (180 / np.pi) ** 2, n_randoms=len(rw))
        z_lo = a.catalogue.z_min if a.catalogue.z_min > 0 else None
        edges = redshift_edges(data.z, a.weights.nz_bin_width, z_lo, a.catalogue.z_max)
        nz = redshift_density(data.z, data.weights, edges, area_sr, cosmo)
        if classes is not None:
            nz_classes = class_densities(data.z, data.weights, d_cls,
                                         footprint.class_areas_sr(), edges, cosmo,
                                         classes.table)
        if a.weights.fkp and classes is not None and classes.local:
            # FKP weights from the n(z) of each object's own depth class
            r_cls = footprint.depth_class[r_fields]
            dw = local_fkp_weights(data.weights, data.z, d_cls, nz_classes, nz,
                                   a.weights.fkp_p0, a.weights.nz_interpolation)
            rw = local_fkp_weights(rw, z_r, r_cls, nz_classes, nz, a.weights.fkp_p0,
                                   a.weights.nz_interpolation)
        elif a.weights.fkp:
            dw = combine_fkp(data.weights, data.z, nz, a.weights.fkp_p0,
                             a.weights.nz_interpolation)
            rw = combine_fkp(rw, z_r, nz, a.weights.fkp_p0, a.weights.nz_interpolation)
        else:
            dw = data.weights
        rpos = sky_to_cartesian(ra_r, dec_r, z_r, cosmo)
        # jackknife regions from the randoms
        scheme = a.covariance.regions
        if scheme == "cubes":
            raise ConfigError("[covariance] regions = 'cubes' is for periodic boxes; use 'kmeans' "
                              "or 'healpix' for a survey")
        if scheme == "fields":
            regions = field_regions(footprint, a.covariance.n_regions, ctx.seed("regions"),
                                    n_sample=a.covariance.kmeans_sample)
            d_reg = regions.assign(data.ra, data.dec)
            r_reg = regions.of_fields(r_fields)
        elif scheme == "kmeans":
            regions = reg.kmeans_regions(ra_r, dec_r, a.covariance.n_regions, ctx.seed("regions"),
                                         n_sample=a.covariance.kmeans_sample)
        else:
            regions = reg.healpix_regions(ra_r, dec_r, a.covariance.n_regions,
                                          nside=a.covariance.region_nside)
        if scheme != "fields":
            d_reg = regions.assign(data.ra, data.dec)
            r_reg = regions.assign(ra_r, dec_r)
        n_regions = regions.n_regions
        reg.check_regions(n_regions, data=d_reg, randoms=r_reg)
        # effective redshift: pair-weighted mean, approximated by sum w^2 z / sum w^2
        # (common practice for the effective redshift of a two-point measurement)
        z_eff = float(np.sum(dw**2 * data.z) / np.sum(dw**2))
    info.update(z_eff=z_eff, n_regions=int(n_regions), n_data=int(data.size))
    log.info("[%s] randoms: %s", a.name, ", ".join(f"{k}={v:.4g}" if isinstance(v, float)
                                                    else f"{k}={v}" for k, v in info.items()))

    def fill(h5: h5py.File) -> None:
        g = h5.create_group("data")
        write_arrays(g, {"weights": dw, "regions": d_reg})
        if rpos is not None:
            r = h5.create_group("randoms")
            write_arrays(r, {"positions": rpos, "weights": rw, "regions": r_reg,
                              "subset": subset})
            if not data.is_box:
                write_arrays(r, {"ra": ra_r, "dec": dec_r, "z": z_r})
        if nz is not None:
            nz.to_hdf5_group(h5.create_group("nz"))
        if classes is not None:
            nz_classes.to_hdf5_group(h5.create_group("nz_classes"))
            write_arrays(g, {"depth_class": d_cls})
            write_arrays(h5["randoms"], {"field": r_fields,
                                          "depth_class": footprint.depth_class[r_fields]})
        for k, v in info.items():
            h5.attrs[k] = v

    return fill


@dataclasses.dataclass(frozen=True)
class _ClassSelection:
    """How the radial selection of a field footprint was set."""

    n_classes: int
    local: bool            # randoms follow each depth class's own selection
    table: Any = None      # TabulatedSelection when read from randoms.selection_file


def local_selection(a) -> bool:
    """Whether an analysis's randoms (and FKP weights) follow each depth class's own
    selection: a field footprint with ``[randoms] redshifts`` per class."""
    return a.footprint.kind == "fields" and a.randoms.redshifts in ("shuffle_by_class", "table")


def _local_randoms(ctx: StageContext, footprint, data, seed):
    """Randoms of a field footprint: per-class selection, or the global one."""
    from corrpipe.survey import randoms as rnd
    from corrpipe.survey.selection import ShuffledByClass, read_selection_table

    a = ctx.analysis
    mode = a.randoms.redshifts
    d_cls = footprint.depth_class_of(data.ra, data.dec)
    n_classes = int(footprint.depth_class.max()) + 1
    n_randoms = int(round(a.randoms.size_factor * data.size))
    rnd.check_randoms_size(data.size, n_randoms, "the requested random catalogue")
    if local_selection(a):
        if mode == "table":
            z_hi = a.catalogue.z_max
            table = read_selection_table(a.randoms.selection_file).restricted(
                a.catalogue.z_min, z_hi)
            selection = table
        else:
            table = None
            selection = ShuffledByClass(data.z, data.weights, d_cls, n_classes)
        # each class gets randoms in proportion to its own data: the surface density of a
        # class follows its depth, not only its area
        counts = np.bincount(d_cls[d_cls >= 0], minlength=n_classes)
        rcat, r_fields = rnd.make_local_randoms(footprint, selection, n_randoms,
                                                n_sets=a.randoms.n_sets, class_counts=counts,
                                                seed=seed, progress=ctx.show_progress)
        return rcat, r_fields, d_cls, _ClassSelection(n_classes, True, table)
    # one selection for the whole survey: global shuffle or smoothed n(z), drawn by class 0
    rcat = rnd.make_randoms(footprint, data.z, data.weights, n_randoms=n_randoms,
                            redshifts=mode, smoothing=a.randoms.smoothing,
                            n_sets=a.randoms.n_sets, seed=seed, progress=ctx.show_progress,
                            z_min=a.catalogue.z_min, z_max=a.catalogue.z_max)
    return rcat, footprint.owner(rcat.ra, rcat.dec), d_cls, _ClassSelection(n_classes, False)


def check_analysis(analysis: Any, where: str) -> None:
    """Checks across [footprint], [randoms] and [covariance], run when the config is loaded."""
    fp, rnd_s, cov = analysis.footprint, analysis.randoms, analysis.covariance
    label = f"{where}: analysis '{analysis.name}'"
    if rnd_s.redshifts in ("shuffle_by_class", "table") and fp.kind != "fields":
        raise ConfigError(f"{label}: randoms.redshifts = '{rnd_s.redshifts}' needs depth "
                          "classes, i.e. footprint.kind = 'fields' with a field table")
    if rnd_s.redshifts == "table" and not rnd_s.selection_file:
        raise ConfigError(f"{label}: randoms.redshifts = 'table' needs randoms.selection_file "
                          "(columns depth_class, z_min, z_max, dndz)")
    if cov.regions == "fields" and fp.kind != "fields":
        raise ConfigError(f"{label}: covariance.regions = 'fields' groups whole fields and "
                          "needs footprint.kind = 'fields'")
    if fp.kind == "fields" and rnd_s.file:
        raise ConfigError(f"{label}: footprint.kind = 'fields' draws its own randoms; leave "
                          "randoms.file empty")


def _region_keys(a) -> dict:
    """The jackknife-region keys of ``[covariance]`` (the randoms stage assigns regions)."""
    return {f"covariance.{f.name}": getattr(a.covariance, f.name)
            for f in dataclasses.fields(RegionSettings)}


def _coverage_area(ra, dec, nside: int) -> float:
    from corrpipe.survey.footprint import footprint_from_data

    return footprint_from_data(ra, dec, nside=nside).area_sr()


TABLES = {"footprint": FootprintSettings, "randoms": RandomsSettings, "weights": WeightsSettings}

STAGE = Stage("randoms", ("footprint", "randoms", "weights"), ("load",), compute,
              inputs=lambda a: [p for p in (a.randoms.file, a.randoms.selection_file,
                                            a.footprint.fields_file,
                                            a.footprint.field_vetoes_file) if p],
              extra=lambda a: {"counts.box_rr": a.counts.box_rr, **_region_keys(a)})
