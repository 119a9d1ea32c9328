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
    from corrpipe.survey.catalog import CatalogueSettings
    from corrpipe.cosmology import CosmologySettings
    from corrpipe.covariance import CovarianceSettings
    from corrpipe.estimators import EstimateSettings
    from corrpipe.fit import FitSettings
    from corrpipe.survey.footprint import FootprintSettings
    from corrpipe.survey.randoms import RandomsSettings
    from corrpipe.distributed import EngineSettings
    from corrpipe.recon import ReconSettings
    from corrpipe.survey.weights import WeightsSettings

    return {
        "cosmology": CosmologySettings,
        "catalogue": CatalogueSettings,
        "footprint": FootprintSettings,
        "randoms": RandomsSettings,
        "weights": WeightsSettings,
        "reconstruct": ReconSettings,
        "counts": CountSettings,
        "engine": EngineSettings,
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
    """Store a :class:`corrpipe.survey.catalog.Catalogue` in an HDF5 group."""
    _write_arrays(group, {"positions": cat.positions, "weights": cat.weights, "ra": cat.ra,
                          "dec": cat.dec, "z": cat.z, "regions": cat.regions})
    group.attrs["name"] = cat.name
    group.attrs["box_size"] = -1.0 if cat.box_size is None else float(cat.box_size)
    group.attrs["los_axis"] = -1 if cat.los_axis is None else int(cat.los_axis)
    group.attrs["meta"] = _json(cat.meta)


def read_catalogue(group: h5py.Group):
    """Read a catalogue stored by :func:`store_catalogue`."""
    from corrpipe.survey.catalog import Catalogue

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
    from corrpipe.survey.catalog import load_catalogue

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
    ``[weights]`` and the region keys of ``[covariance]``)."""
    from corrpipe.survey import randoms as rnd
    from corrpipe.survey import regions as reg
    from corrpipe.survey.catalog import load_sky_catalogue
    from corrpipe.cosmology import sky_to_cartesian
    from corrpipe.survey.footprint import check_data_inside, footprint_from_settings
    from corrpipe.survey.weights import combine_fkp, redshift_density, redshift_edges

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
        scheme = a.covariance.regions
        if scheme == "cubes":
            raise ConfigError("[covariance] regions = 'cubes' is for periodic boxes; use 'kmeans' "
                              "or 'healpix' for a survey")
        if scheme == "kmeans":
            regions = reg.kmeans_regions(ra_r, dec_r, a.covariance.n_regions, ctx.seed("regions"),
                                         n_sample=a.covariance.kmeans_sample)
        else:
            regions = reg.healpix_regions(ra_r, dec_r, a.covariance.n_regions,
                                          nside=a.covariance.region_nside)
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


def _region_keys(a) -> dict:
    """The jackknife-region keys of ``[covariance]`` (the randoms stage assigns regions)."""
    from corrpipe.survey.regions import RegionSettings
    import dataclasses

    return {f"covariance.{f.name}": getattr(a.covariance, f.name)
            for f in dataclasses.fields(RegionSettings)}


def _coverage_area(ra, dec, nside: int) -> float:
    from corrpipe.survey.footprint import footprint_from_data

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
    """Runs the pair counts of the counts stage on the configured engine, one sidecar each.

    Used as a context manager so that a Dask cluster (``[engine] kind = "dask"``) is opened
    once for all the counts of the stage.
    """

    def __init__(self, ctx: StageContext, box_size, los: str, n_regions: int):
        self.ctx, self.box_size, self.los, self.n_regions = ctx, box_size, los, n_regions
        self.threads = ctx.config.run.threads or None
        self.engine = ctx.analysis.engine
        self._stack = None
        self.client = None

    def __enter__(self) -> "_Counter":
        import contextlib

        self._stack = contextlib.ExitStack()
        if self.engine.kind != "threads":
            from corrpipe.distributed import open_engine

            self.client = self._stack.enter_context(open_engine(self.engine))
        return self

    def __exit__(self, *exc) -> None:
        self._stack.close()

    def __call__(self, label: str, binning, pos1, w1, reg1, pos2=None, w2=None, reg2=None):
        from corrpipe.distributed import count_pairs_on

        log.info("[%s] counts: %s (%d x %s objects)", self.ctx.analysis.name, label, len(w1),
                 "self" if pos2 is None else len(w2))
        regions = self.n_regions > 0
        return count_pairs_on(self.engine, pos1, w1, pos2, w2, binning=binning, los=self.los,
                              box_size=self.box_size, regions1=reg1 if regions else None,
                              regions2=reg2 if regions and pos2 is not None else None,
                              n_regions=self.n_regions if regions else None,
                              raw=self.ctx.analysis.counts.raw_counts, n_threads=self.threads,
                              progress=self.ctx.show_progress,
                              progress_path=self.ctx.sidecar(label), client=self.client)


def _read_inputs_for_counts(ctx: StageContext) -> dict:
    """Positions, weights and region labels of D, R (and S, shifted D) for the counts stage."""
    a = ctx.analysis
    with ctx.read("load") as h5:
        data = read_catalogue(h5["data"])
    out: dict[str, Any] = {"box_size": data.box_size, "los_axis": data.los_axis}
    with ctx.read("randoms") as h5:
        out["D"] = (data.positions, h5["data/weights"][()],
                    h5["data/regions"][()] if "data/regions" in h5 else None)
        out["n_regions"] = int(h5.attrs["n_regions"])
        if "randoms" in h5:
            r = h5["randoms"]
            out["R"] = (r["positions"][()], r["weights"][()],
                        r["regions"][()] if "regions" in r else None)
            out["subset"] = r["subset"][()]
    if a.reconstruct.enabled:
        from corrpipe.recon import ReconResult

        with ctx.read("reconstruct") as h5:
            rec = ReconResult.from_hdf5(h5["reconstruction"])
            s_reg = h5["shifted_random_regions"][()] if "shifted_random_regions" in h5 else None
        out["D"] = (rec.data_positions, rec.data_weights, out["D"][2])
        out["S"] = (rec.random_positions, rec.random_weights, s_reg)
    return out


def _counts(ctx: StageContext):
    """DD, DR and RR (split over random sets; analytic for a box) in (s, mu) [and (r_p, pi)];
    after reconstruction DD, DS, SS on the shifted catalogues and RR on the unshifted randoms."""
    from corrpipe.paircount import combine_split_counts

    a = ctx.analysis
    inp = _read_inputs_for_counts(ctx)
    box_size, n_regions = inp["box_size"], inp["n_regions"]
    results: dict[str, dict[str, Any]] = {}
    with _Counter(ctx, box_size, _los(a, inp["los_axis"]), n_regions) as counter:
        for mode, binning in _binnings(a).items():
            res = {"DD": counter(f"{mode}-DD", binning, *inp["D"])}
            if "S" in inp:
                res["DS"] = counter(f"{mode}-DS", binning, *inp["D"], *inp["S"])
                res["SS"] = counter(f"{mode}-SS", binning, *inp["S"])
            elif "R" in inp:
                res["DR"] = counter(f"{mode}-DR", binning, *inp["D"], *inp["R"])
            if "R" in inp:
                rpos, rw, r_reg = inp["R"]
                subset = inp["subset"]
                n_sets = int(subset.max()) + 1
                parts = []
                for k in range(n_sets):
                    sel = subset == k
                    parts.append(counter(f"{mode}-RR{k}", binning, rpos[sel], rw[sel],
                                         None if r_reg is None else r_reg[sel]))
                res["RR"] = parts[0] if n_sets == 1 else combine_split_counts(parts)
            else:
                from corrpipe.paircount import analytic_box_rr

                w = inp["D"][1]
                res["RR"] = analytic_box_rr(binning, float(box_size), n=int(w.size),
                                            sum_w=float(w.sum()), sum_w_sq=float(np.sum(w**2)))
            results[mode] = res
        los = counter.los

    def fill(h5: h5py.File) -> None:
        for mode, res in results.items():
            g = h5.create_group(mode)
            for name, pc in res.items():
                pc.to_hdf5(g.create_group(name))
        h5.attrs["line_of_sight"] = los
        h5.attrs["n_regions"] = n_regions
        h5.attrs["reconstructed"] = bool(a.reconstruct.enabled)

    return fill


def read_counts(h5: h5py.File, mode: str = "smu") -> dict:
    """Read the {name: PairCounts} of one binning from an open ``counts.h5``."""
    from corrpipe.paircount import PairCounts

    return {name: PairCounts.from_hdf5(g) for name, g in h5[mode].items()}


def _reconstruct(ctx: StageContext):
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
    f = recon.resolve_growth_rate(rs, _cosmology(a), z_eff)
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


def _estimate(ctx: StageContext):
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


def _mock_vectors(ctx: StageContext, files: list[str]) -> np.ndarray:
    """Multipole vectors of mock catalogues through the same counts as the data.

    Each mock is loaded with the data's ``[catalogue]`` settings (only the path differs), gets
    the data's FKP weighting (n(z) of the data), and is counted against the data's randoms;
    the RR counts are shared (common practice when the mocks follow the data's footprint and
    n(z)).
    """
    import dataclasses

    from corrpipe.survey.catalog import load_catalogue
    from corrpipe.estimators import estimate_from_counts
    from corrpipe.survey.weights import RedshiftDensity, combine_fkp

    a = ctx.analysis
    cosmo = _cosmology(a)
    with ctx.read("counts") as h5:
        rr = read_counts(h5, "smu")["RR"]
    with ctx.read("randoms") as h5:
        has_r = "randoms" in h5
        if has_r:
            rpos, rw = h5["randoms/positions"][()], h5["randoms/weights"][()]
        nz = RedshiftDensity.from_hdf5_group(h5["nz"]) if "nz" in h5 else None
    binning = _binnings(a)["smu"]
    vectors = []
    with _Counter(ctx, None, a.counts.line_of_sight, 0) as counter:
        for i, path in enumerate(files):
            mock = load_catalogue(dataclasses.replace(a.catalogue, path=path), cosmo)
            w = mock.weights
            if nz is not None and a.weights.fkp:
                w = combine_fkp(w, mock.z, nz, a.weights.fkp_p0, a.weights.nz_interpolation)
            counter.box_size = mock.box_size
            counter.los = _los(a, mock.los_axis)
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


def _covariance(ctx: StageContext):
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
        lp = build_linear_power(_cosmology(a), float(a.catalogue.box_redshift), a.fit)
        bias2 = c.bias**2
        pk = lambda k: bias2 * lp(k)  # noqa: E731
    nbar = float(data.size) / float(data.box_size) ** 3
    return cv.gaussian_box_covariance(pk, nbar, float(data.box_size) ** 3, s_edges,
                                      a.estimate.ells, beta=c.beta, k_max=c.k_max)


def _fit_inputs(a, est, cov, fit, n_params: int) -> dict:
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
    import dataclasses

    settings = analysis.fit
    if analysis.reconstruct.enabled and not settings.reconstructed:
        settings = dataclasses.replace(settings, reconstructed=True,
                                       recon_convention=analysis.reconstruct.convention,
                                       smoothing_radius=analysis.reconstruct.smoothing)
    return settings


def _fit(ctx: StageContext):
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
    cosmo = _cosmology(a)
    inputs = _fit_inputs(a, est, cov, settings, settings.n_fit_parameters)
    result = fit_multipoles(cosmology=cosmo, z_eff=z_eff, settings=settings,
                            progress_path=ctx.progress_path, progress=ctx.show_progress,
                            seed=ctx.seed("mcmc") % (2**32), covariance_type=cov.kind,
                            name=a.name, **inputs)

    def fill(h5: h5py.File) -> None:
        result.to_hdf5(h5.create_group("fit"))

    return fill


def _report(ctx: StageContext):
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


STAGES: tuple[Stage, ...] = (
    Stage("load", ("catalogue", "cosmology"), (), _load,
          inputs=lambda a: [a.catalogue.path]),
    Stage("randoms", ("footprint", "randoms", "weights"), ("load",), _randoms,
          inputs=lambda a: [a.randoms.file] if a.randoms.file else [],
          extra=lambda a: {"counts.box_rr": a.counts.box_rr, **_region_keys(a)}),
    Stage("reconstruct", ("reconstruct",), ("load", "randoms"), _reconstruct,
          enabled=lambda a: a.reconstruct.enabled,
          extra=lambda a: {"covariance.cubes_per_side": a.covariance.cubes_per_side}),
    Stage("counts", ("counts",), ("load", "randoms", "reconstruct"), _counts),
    Stage("estimate", ("estimate",), ("counts", "randoms"), _estimate),
    Stage("covariance", ("covariance",), ("load", "randoms", "counts", "estimate"), _covariance,
          extra=lambda a: {"fit-template-for-analytic": a.section_dict("fit")
                           if a.covariance.kind == "analytic" else None},
          inputs=lambda a: _mock_inputs(a)),
    Stage("fit", ("fit", "cosmology"), ("estimate", "covariance", "reconstruct"), _fit,
          extra=lambda a: {"reconstruct.enabled": a.reconstruct.enabled}),
    Stage("report", ("report",), ("fit", "randoms"), _report),
)


def _mock_inputs(a) -> list:
    if a.covariance.kind != "mocks":
        return []
    from corrpipe.covariance import expand_mock_paths

    return expand_mock_paths(a.covariance.mocks)


# ============================================================================ fit-only runs


def fit_external(config, path, output=None, *, progress: bool = True) -> dict:
    """Fit an external multipoles + covariance file with the config's ``[fit]`` settings.

    The file formats are those of :func:`corrpipe.fit.external.load_external_multipoles`.
    Results go to ``output`` (default: ``<run output>/external``): ``fit.h5``,
    ``summary.json``, ``summary.txt`` and the plots.

    Returns
    -------
    dict
        ``{"summary": summary dict, "text": text summary}``.
    """
    from pathlib import Path

    from corrpipe.checkpoint import write_checkpoint, write_json_atomic, write_text_atomic
    from corrpipe.fit import fit_multipoles
    from corrpipe.fit.external import load_external_multipoles
    from corrpipe.pipeline import file_digest, output_lock

    analysis = config.analyses[0]
    ext = load_external_multipoles(path)
    z_eff = ext.z_eff if ext.z_eff is not None else None
    if z_eff is None:
        raise StageError(f"{path} gives no effective redshift; add the attribute/header "
                         "z_eff (see README, 'External data')")
    folder = Path(output) if output is not None else Path(config.run.output) / "external"
    meta = ext.meta
    with output_lock(folder):
        result = fit_multipoles(ext.s, ext.data_vector, ext.covariance, ext.ells,
                                cosmology=_cosmology(analysis), z_eff=float(z_eff),
                                settings=fit_settings_of(analysis),
                                progress_path=folder / ".fit.external.progress.h5",
                                progress=progress, seed=config.run.seed % (2**32),
                                covariance_type=str(meta.get("covariance_type", "external")),
                                precision_factor=float(meta.get("precision_factor", 1.0)),
                                variance_factor=float(meta.get("variance_factor", 1.0)),
                                name=f"{analysis.name}-external")
        summary = result.to_dict()
        summary["input_file"] = str(path)
        write_checkpoint(folder / "fit.h5", "fit", file_digest(path),
                         lambda h5: result.to_hdf5(h5.create_group("fit")),
                         {"config_text": config.text, "input_digests":
                          json.dumps({str(path): file_digest(path)})})
        write_json_atomic(folder / "summary.json", summary)
        text = result.text_summary()
        write_text_atomic(folder / "summary.txt", text + "\n")
        progress_file = folder / ".fit.external.progress.h5"
        if progress_file.exists():
            progress_file.unlink()
    return {"summary": summary, "text": text}



# ============================================================================ demo and mocks


def run_demo(output, *, seed: int = 7, scale: str = "demo", progress: bool = True,
             echo=print) -> dict:
    """Make the built-in (fictional) demo survey, run the pipeline, compare with the truth.

    Returns
    -------
    dict
        ``{"truth": {...}, "recovered": {...}, "summary": summary.json contents}``.
    """
    import time
    from pathlib import Path

    from corrpipe.api import run as run_pipeline
    from corrpipe.config import load_config
    from corrpipe.demo import SURVEY_NAME, TRACER, truth_vs_recovered, write_demo_inputs

    start = time.perf_counter()
    folder = Path(output)
    echo(f"corrpipe demo: {SURVEY_NAME} (fictional), {TRACER}; writing inputs to {folder}")
    inputs = write_demo_inputs(folder, seed=seed, scale=scale, progress=progress)
    echo(f"  {inputs.n_galaxies} galaxies and {inputs.n_randoms} randoms over "
         f"{inputs.area_deg2:.0f} deg^2 ({inputs.seconds:.0f} s); config {inputs.config}")
    cfg = load_config(inputs.config)
    run_pipeline(cfg, progress=progress, echo=echo)
    results = cfg.analysis_folder(cfg.analyses[0])
    summary = json.loads((results / "summary.json").read_text())
    truth = inputs.truth_at(summary["z_eff"])
    echo("")
    echo("Truth injected into the demo survey against what the pipeline recovered:")
    echo(truth_vs_recovered(truth, summary["summary"], summary.get("distances")))
    echo(f"results: {results} (summary.json, report/*.png); total "
         f"{time.perf_counter() - start:.0f} s")
    recovered = {}
    for key, true in (("alpha_par", truth.alpha_par), ("alpha_perp", truth.alpha_perp),
                      ("alpha", truth.alpha_iso)):
        s = summary["summary"][key]
        err = 0.5 * (s["p84"] - s["p16"])
        recovered[key] = {"truth": true, "median": s["median"], "error": err,
                          "pull": (s["median"] - true) / err if err > 0 else float("nan")}
    return {"truth": truth.as_dict(), "recovered": recovered, "summary": summary}


def write_mock_files(config_path, output=None, *, progress: bool = True, echo=print) -> list:
    """Write the mocks a TOML file's ``[mock]`` table describes (``corrpipe mock``)."""
    from pathlib import Path

    from corrpipe.config import tomllib, validate_section
    from corrpipe.errors import ConfigError
    from corrpipe.mocks import MockSettings, write_mocks

    path = Path(config_path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise ConfigError(f"mock config {path} does not exist") from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML: {exc}") from exc
    unknown = [k for k in data if k not in ("mock", "cosmology")]
    if "mock" not in data or unknown:
        raise ConfigError(f"{path}: a mock config has a [mock] table (and optionally "
                          f"[cosmology] for the fiducial the expected dilation refers to); "
                          f"found {sorted(data)}")
    settings = validate_section(MockSettings, data["mock"], "mock", str(path),
                                path.resolve().parent)
    fiducial = None
    if "cosmology" in data:
        from corrpipe.cosmology import CosmologySettings

        fiducial = validate_section(CosmologySettings, data["cosmology"], "cosmology",
                                    str(path), path.resolve().parent).build()
    folder = Path(output) if output is not None else path.resolve().parent
    files = write_mocks(settings, folder, fiducial=fiducial, progress=progress, echo=echo)
    return [f.data for f in files]
