"""The pipeline's stages: what each reads and writes, and the glue to the numerical modules.

Stage order: ``load -> randoms -> [reconstruct] -> counts -> estimate -> covariance -> fit ->
report``. Each stage function takes a :class:`corrpipe.pipeline.StageContext`, computes, and
returns a ``fill(h5)`` callable that stores its results; the pipeline writes the file
atomically. The numerics live in the modules named in each function; nothing here loops over
objects or pairs.
"""

from __future__ import annotations

import json
import logging
from dataclasses import dataclass
from typing import Any

import h5py
import numpy as np

from corrpipe.errors import ConfigError, StageError
from corrpipe.pipeline import Stage, StageContext
from corrpipe.settings import setting

__all__ = [
    "CountSettings",
    "ReportSettings",
    "STAGES",
    "stage_section_classes",
    "cross_check",
]

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class CountSettings:
    """Config table ``[counts]``: bins and line of sight of the pair counts."""

    s_min: float = setting(0.0, "smallest separation of the (s, mu) bins", unit="Mpc/h", low=0.0)
    s_max: float = setting(200.0, "largest separation of the (s, mu) bins", unit="Mpc/h",
                           low=0.0, low_open=True, high=1000.0)
    n_s: int = setting(40, "number of s bins", low=1, high=10000)
    spacing: str = setting("linear", "spacing of the s bins", choices=("linear", "log"))
    n_mu: int = setting(100, "number of mu bins", low=1, high=10000)
    mu_range: str = setting("absolute", "bin |mu| over [0, 1] or signed mu over [-1, 1]",
                            choices=("absolute", "signed"))
    line_of_sight: str = setting("midpoint", "line of sight of survey pairs (boxes use the "
                                 "catalogue's fixed axis)", choices=("midpoint", "endpoint",
                                                                     "bisector"))
    projected: bool = setting(False, "also count in (r_p, pi) for w_p(r_p)")
    rp_min: float = setting(0.5, "smallest r_p (log bins)", unit="Mpc/h", low=0.0, low_open=True)
    rp_max: float = setting(60.0, "largest r_p", unit="Mpc/h", low=0.0, low_open=True)
    n_rp: int = setting(16, "number of log-spaced r_p bins", low=1, high=1000)
    pi_max: float = setting(80.0, "largest |pi| (line-of-sight separation)", unit="Mpc/h",
                            low=0.0, low_open=True)
    n_pi: int = setting(80, "number of linear pi bins", low=1, high=10000)
    raw_counts: bool = setting(True, "store unweighted pair numbers beside the weighted counts")
    box_rr: str = setting("analytic", "RR of a periodic box: analytic (no randoms) or counted "
                          "from randoms (needed for jackknife regions)",
                          choices=("analytic", "randoms"))

    def validate(self) -> None:
        """Cross-field checks of the table."""
        if self.s_min >= self.s_max:
            raise ConfigError(f"s_min = {self.s_min} must be below s_max = {self.s_max}")
        if self.spacing == "log" and self.s_min <= 0:
            raise ConfigError("spacing = 'log' needs s_min > 0")
        if self.rp_min >= self.rp_max:
            raise ConfigError(f"rp_min = {self.rp_min} must be below rp_max = {self.rp_max}")

    def s_edges(self) -> np.ndarray:
        """Edges of the s bins, Mpc/h."""
        if self.spacing == "log":
            return np.geomspace(self.s_min, self.s_max, self.n_s + 1)
        return np.linspace(self.s_min, self.s_max, self.n_s + 1)


@dataclass(frozen=True)
class ReportSettings:
    """Config table ``[report]``: plots and summary."""

    plots: bool = setting(True, "write PNG plots of the multipoles, residuals and posteriors")
    dpi: int = setting(120, "resolution of the PNG plots", low=30, high=600)


def stage_section_classes() -> dict[str, type]:
    """Config table name -> settings dataclass for every stage table."""
    from corrpipe.catalog import CatalogueSettings
    from corrpipe.cosmology import CosmologySettings
    from corrpipe.covariance import CovarianceSettings
    from corrpipe.estimators import EstimateSettings
    from corrpipe.fit import FitSettings
    from corrpipe.footprint import FootprintSettings
    from corrpipe.randoms import RandomsSettings
    from corrpipe.regions import RegionSettings
    from corrpipe.weights import WeightsSettings

    return {
        "cosmology": CosmologySettings,
        "catalogue": CatalogueSettings,
        "footprint": FootprintSettings,
        "randoms": RandomsSettings,
        "weights": WeightsSettings,
        "regions": RegionSettings,
        "counts": CountSettings,
        "estimate": EstimateSettings,
        "covariance": CovarianceSettings,
        "fit": FitSettings,
        "report": ReportSettings,
    }


def cross_check(analysis: Any, where: str) -> None:
    """Checks across tables of one analysis, run when the config is loaded."""
    counts, fit = analysis.counts, analysis.fit
    s_lo, s_hi = getattr(fit, "s_min", None), getattr(fit, "s_max", None)
    if s_lo is not None and s_hi is not None:
        if s_lo < counts.s_min or s_hi > counts.s_max:
            raise ConfigError(
                f"{where}: analysis '{analysis.name}': the fit range [fit] s_min..s_max = "
                f"{s_lo:g}..{s_hi:g} Mpc/h lies outside the counted range [counts] "
                f"s_min..s_max = {counts.s_min:g}..{counts.s_max:g}; widen [counts] or narrow [fit]")


def _json(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, default=lambda o: o.tolist()
                      if isinstance(o, np.ndarray) else str(o))


def _cosmology(analysis):
    return analysis.cosmology.build()


def _write_arrays(group: h5py.Group, arrays: dict[str, Any]) -> None:
    for key, value in arrays.items():
        if value is None:
            continue
        group.create_dataset(key, data=np.asarray(value))


# ============================================================================ storage


def store_catalogue(group: h5py.Group, cat) -> None:
    """Store a :class:`corrpipe.catalog.Catalogue` in an HDF5 group."""
    _write_arrays(group, {"positions": cat.positions, "weights": cat.weights, "ra": cat.ra,
                          "dec": cat.dec, "z": cat.z, "regions": cat.regions})
    group.attrs["name"] = cat.name
    group.attrs["box_size"] = -1.0 if cat.box_size is None else float(cat.box_size)
    group.attrs["los_axis"] = -1 if cat.los_axis is None else int(cat.los_axis)
    group.attrs["meta"] = _json(cat.meta)


def read_catalogue(group: h5py.Group):
    """Read a catalogue stored by :func:`store_catalogue`."""
    from corrpipe.catalog import Catalogue

    get = lambda k: group[k][()] if k in group else None  # noqa: E731
    box = float(group.attrs["box_size"])
    axis = int(group.attrs["los_axis"])
    return Catalogue(positions=get("positions"), weights=get("weights"), ra=get("ra"),
                     dec=get("dec"), z=get("z"), box_size=None if box < 0 else box,
                     los_axis=None if axis < 0 else axis, regions=get("regions"),
                     name=str(group.attrs["name"]), meta=json.loads(group.attrs["meta"]))


# ============================================================================ stages
# Each function: compute(ctx) -> fill(h5)


def _load(ctx: StageContext):
    """Read and validate the data catalogue (``[catalogue]``, ``[cosmology]``)."""
    from corrpipe.catalog import load_catalogue

    a = ctx.analysis
    cat = load_catalogue(a.catalogue, _cosmology(a))
    log.info("[%s] load: %d objects kept from %s", a.name, len(cat.weights), a.catalogue.path)

    def fill(h5: h5py.File) -> None:
        store_catalogue(h5.create_group("data"), cat)

    return fill


def _box_uses_randoms(a) -> bool:
    return a.counts.box_rr == "randoms"


def _randoms(ctx: StageContext):
    """Randoms, n(z), FKP weights and jackknife regions (``[footprint]``, ``[randoms]``,
    ``[weights]``, ``[regions]``)."""
    from corrpipe import randoms as rnd
    from corrpipe import regions as reg
    from corrpipe.catalog import load_sky_catalogue
    from corrpipe.cosmology import sky_to_cartesian
    from corrpipe.footprint import check_data_inside, footprint_from_settings
    from corrpipe.weights import combine_fkp, redshift_density, redshift_edges

    a = ctx.analysis
    cosmo = _cosmology(a)
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    seed = a.randoms.seed if a.randoms.seed >= 0 else ctx.seed("randoms")
    info: dict[str, Any] = {"seed": int(seed)}

    if data.is_box:
        L = float(data.box_size)
        if _box_uses_randoms(a):
            n_r = int(round(a.randoms.size_factor * data.size))
            rpos = rnd.box_randoms(n_r, L, seed)
            rw = np.ones(n_r)
            subset = np.arange(n_r, dtype=np.int64) % a.randoms.n_sets
            n_side = a.regions.cubes_per_side
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
                    area_deg2=area_sr * (180 / np.pi) ** 2, n_randoms=int(len(rw)))
        z_lo = a.catalogue.z_min if a.catalogue.z_min > 0 else None
        edges = redshift_edges(data.z, a.weights.nz_bin_width, z_lo, a.catalogue.z_max)
        nz = redshift_density(data.z, data.weights, edges, area_sr, cosmo)
        if a.weights.fkp:
            dw = combine_fkp(data.weights, data.z, nz, a.weights.fkp_p0,
                             a.weights.nz_interpolation)
            rw = combine_fkp(rw, z_r, nz, a.weights.fkp_p0, a.weights.nz_interpolation)
        else:
            dw = data.weights
        rpos = sky_to_cartesian(ra_r, dec_r, z_r, cosmo)
        # jackknife regions from the randoms
        scheme = a.regions.regions
        if scheme == "cubes":
            raise ConfigError("[regions] regions = 'cubes' is for periodic boxes; use 'kmeans' "
                              "or 'healpix' for a survey")
        if scheme == "kmeans":
            regions = reg.kmeans_regions(ra_r, dec_r, a.regions.n_regions, seed,
                                         n_sample=a.regions.kmeans_sample)
        else:
            regions = reg.healpix_regions(ra_r, dec_r, a.regions.n_regions,
                                          nside=a.regions.region_nside)
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
        _write_arrays(g, {"weights": dw, "regions": d_reg})
        if rpos is not None:
            r = h5.create_group("randoms")
            _write_arrays(r, {"positions": rpos, "weights": rw, "regions": r_reg,
                              "subset": subset})
            if not data.is_box:
                _write_arrays(r, {"ra": ra_r, "dec": dec_r, "z": z_r})
        if nz is not None:
            nz.to_hdf5_group(h5.create_group("nz"))
        for k, v in info.items():
            h5.attrs[k] = v

    return fill


def _coverage_area(ra, dec, nside: int) -> float:
    from corrpipe.footprint import footprint_from_data

    return footprint_from_data(ra, dec, nside=nside).area_sr()


def _binnings(a) -> dict:
    """The binnings the ``[counts]`` table asks for: {"smu": Binning, ["rppi": Binning]}."""
    from corrpipe.paircount import Binning

    c = a.counts
    mu_lo = 0.0 if c.mu_range == "absolute" else -1.0
    out = {"smu": Binning.from_edges(c.s_edges(), np.linspace(mu_lo, 1.0, c.n_mu + 1),
                                     mu_range=c.mu_range)}
    if c.projected:
        out["rppi"] = Binning.from_edges(np.geomspace(c.rp_min, c.rp_max, c.n_rp + 1),
                                         pi_edges=np.linspace(0.0, c.pi_max, c.n_pi + 1))
    return out


def _los(a, box_axis) -> str:
    return "xyz"[box_axis] if box_axis is not None else a.counts.line_of_sight


class _Counter:
    """Runs the pair counts of the counts stage on the configured engine, one sidecar each."""

    def __init__(self, ctx: StageContext, box_size, los: str, n_regions: int):
        self.ctx, self.box_size, self.los, self.n_regions = ctx, box_size, los, n_regions
        self.threads = ctx.config.run.threads or None

    def __call__(self, label: str, binning, pos1, w1, reg1, pos2=None, w2=None, reg2=None):
        from corrpipe.paircount import count_pairs

        log.info("[%s] counts: %s (%d x %s objects)", self.ctx.analysis.name, label, len(w1),
                 "self" if pos2 is None else len(w2))
        regions = self.n_regions > 0
        return count_pairs(pos1, w1, pos2, w2, binning=binning, los=self.los,
                           box_size=self.box_size, regions1=reg1 if regions else None,
                           regions2=reg2 if regions and pos2 is not None else None,
                           n_regions=self.n_regions if regions else None,
                           raw=self.ctx.analysis.counts.raw_counts, n_threads=self.threads,
                           progress=self.ctx.show_progress,
                           progress_path=self.ctx.sidecar(label))


def _sum_split(parts: list):
    """Split-random RR: sum the per-set counts and their normalisations (Keihänen et al. 2019)."""
    from dataclasses import replace

    first = parts[0]
    total = lambda name: None if getattr(first, name) is None else sum(  # noqa: E731
        getattr(p, name) for p in parts)
    region_norm = None
    if first.n_regions:
        region_norm = np.array([sum(p.jackknife_norm(k) for p in parts)
                                for k in range(first.n_regions)])
    return replace(first, weighted=total("weighted"), raw=total("raw"),
                   region_both=total("region_both"), region_one=total("region_one"),
                   sum_w1=total("sum_w1"), sum_w1_sq=total("sum_w1_sq"),
                   sum_w2=total("sum_w2"), sum_w2_sq=total("sum_w2_sq"),
                   n1=total("n1"), n2=total("n2"),
                   region_sum_w1=total("region_sum_w1"),
                   region_sum_w1_sq=total("region_sum_w1_sq"),
                   region_sum_w2=total("region_sum_w2"),
                   region_sum_w2_sq=total("region_sum_w2_sq"),
                   pair_norm=float(sum(p.norm for p in parts)),
                   region_pair_norm=region_norm,
                   meta={**first.meta, "rr_splits": len(parts)})


def _counts(ctx: StageContext):
    """DD, DR and RR (split over random sets; analytic for a box) in (s, mu) [and (r_p, pi)]."""
    a = ctx.analysis
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    with ctx.read("randoms") as h5:
        dw = h5["data/weights"][()]
        d_reg = h5["data/regions"][()] if "data/regions" in h5 else None
        has_randoms = "randoms" in h5
        if has_randoms:
            rpos = h5["randoms/positions"][()]
            rw = h5["randoms/weights"][()]
            r_reg = h5["randoms/regions"][()] if "randoms/regions" in h5 else None
            subset = h5["randoms/subset"][()]
        n_regions = int(h5.attrs["n_regions"])
    counter = _Counter(ctx, data.box_size, _los(a, data.los_axis), n_regions)
    results: dict[str, dict[str, Any]] = {}
    for mode, binning in _binnings(a).items():
        res = {"DD": counter(f"{mode}-DD", binning, data.positions, dw, d_reg)}
        if has_randoms:
            res["DR"] = counter(f"{mode}-DR", binning, data.positions, dw, d_reg, rpos, rw, r_reg)
            n_sets = int(subset.max()) + 1
            parts = []
            for k in range(n_sets):
                sel = subset == k
                parts.append(counter(f"{mode}-RR{k}", binning, rpos[sel], rw[sel],
                                     None if r_reg is None else r_reg[sel]))
            res["RR"] = parts[0] if n_sets == 1 else _sum_split(parts)
        else:
            from corrpipe.paircount import analytic_box_rr

            res["RR"] = analytic_box_rr(binning, float(data.box_size), float(dw.sum()),
                                        float(np.sum(dw**2)), int(dw.size))
        results[mode] = res

    def fill(h5: h5py.File) -> None:
        for mode, res in results.items():
            g = h5.create_group(mode)
            for name, pc in res.items():
                pc.to_hdf5(g.create_group(name))
        h5.attrs["line_of_sight"] = counter.los
        h5.attrs["n_regions"] = n_regions

    return fill


def read_counts(h5: h5py.File, mode: str = "smu") -> dict:
    """Read the {name: PairCounts} of one binning from an open ``counts.h5``."""
    from corrpipe.paircount import PairCounts

    return {name: PairCounts.from_hdf5(g) for name, g in h5[mode].items()}


STAGES: tuple[Stage, ...] = (
    Stage("load", ("catalogue", "cosmology"), (), _load,
          inputs=lambda a: [a.catalogue.path]),
    Stage("randoms", ("footprint", "randoms", "weights", "regions"), ("load",), _randoms,
          inputs=lambda a: [a.randoms.file] if a.randoms.file else [],
          extra=lambda a: {"counts.box_rr": a.counts.box_rr}),
    Stage("counts", ("counts",), ("load", "randoms"), _counts,
          extra=lambda a: {}),
)
