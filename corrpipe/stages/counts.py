"""Stage ``counts``: DD, DR and RR pair counts on the configured engine (``[counts]``,
``[engine]``), and the ``[counts]`` table itself."""

from __future__ import annotations

import contextlib
import logging
from dataclasses import dataclass
from typing import Any

import h5py
import numpy as np

from corrpipe.distributed import EngineSettings
from corrpipe.errors import ConfigError
from corrpipe.settings import setting
from corrpipe.stages.base import Stage, StageContext
from corrpipe.stages.common import read_catalogue

__all__ = ["CountSettings", "STAGE", "TABLES", "binnings", "line_of_sight", "PairCounter", "read_counts"]

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


def binnings(a) -> dict:
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


def line_of_sight(a, box_axis) -> str:
    return "xyz"[box_axis] if box_axis is not None else a.counts.line_of_sight


class PairCounter:
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

    def __enter__(self) -> "PairCounter":
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


def compute(ctx: StageContext):
    """DD, DR and RR (split over random sets; analytic for a box) in (s, mu) [and (r_p, pi)];
    after reconstruction DD, DS, SS on the shifted catalogues and RR on the unshifted randoms."""
    from corrpipe.paircount import combine_split_counts

    a = ctx.analysis
    inp = _read_inputs_for_counts(ctx)
    box_size, n_regions = inp["box_size"], inp["n_regions"]
    results: dict[str, dict[str, Any]] = {}
    with PairCounter(ctx, box_size, line_of_sight(a, inp["los_axis"]), n_regions) as counter:
        for mode, binning in binnings(a).items():
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


TABLES = {"counts": CountSettings, "engine": EngineSettings}

STAGE = Stage("counts", ("counts",), ("load", "randoms", "reconstruct"), compute)
