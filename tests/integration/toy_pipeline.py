"""A three-stage toy pipeline for testing the stage machinery without physics.

``a`` reads an input text file of numbers (scaled by [alpha] factor), ``b`` sums them with
[beta] offset (optionally sleeping, to be killed mid-stage), ``c`` squares with [gamma] power.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass

import numpy as np

from corrpipe.pipeline import Stage, run_batch
from corrpipe.settings import setting


@dataclass(frozen=True)
class Alpha:
    """Stage a."""

    path: str = setting("numbers.txt", "input numbers", path=True)
    factor: float = setting(1.0, "scale")


@dataclass(frozen=True)
class Beta:
    """Stage b."""

    offset: float = setting(0.0, "added")
    sleep: float = setting(0.0, "seconds to sleep mid-stage", low=0.0)


@dataclass(frozen=True)
class Gamma:
    """Stage c."""

    power: float = setting(2.0, "exponent")


@dataclass(frozen=True)
class Delta:
    """Batch stage total (top-level table only)."""

    scale: float = setting(1.0, "multiplies the sum over analyses")


CLASSES = {"alpha": Alpha, "beta": Beta, "gamma": Gamma}
BATCH_CLASSES = {"delta": Delta}
CALLS: list[str] = []


def _a(ctx):
    CALLS.append("a")
    x = np.loadtxt(ctx.analysis.alpha.path) * ctx.analysis.alpha.factor
    return lambda h5: h5.create_dataset("x", data=x)


def _b(ctx):
    CALLS.append("b")
    with ctx.read("a") as h5:
        x = h5["x"][()]
    # partial progress goes to the sidecar while we work
    ctx.progress_path.write_text("half done")
    if ctx.analysis.beta.sleep:
        time.sleep(ctx.analysis.beta.sleep)
    total = np.array([x.sum() + ctx.analysis.beta.offset])
    big = np.arange(200_000, dtype=float)  # makes the file write take a little while
    return lambda h5: (h5.create_dataset("total", data=total), h5.create_dataset("big", data=big))


def _c(ctx):
    CALLS.append("c")
    with ctx.read("b") as h5:
        t = h5["total"][()]
    return lambda h5: h5.create_dataset("y", data=t ** ctx.analysis.gamma.power)


def _total(ctx):
    CALLS.append("total")
    values = []
    for analysis in ctx.analyses:
        with ctx.read_analysis(analysis.name, "c") as h5:
            values.append(float(h5["y"][0]))
    total = np.array([sum(values) * ctx.config.delta.scale])
    return lambda h5: h5.create_dataset("total", data=total)


BATCH_STAGES = (Stage("total", ("delta",), ("c",), _total, scope="batch"),)

STAGES = (
    Stage("a", ("alpha",), (), _a, inputs=lambda an: [an.alpha.path]),
    Stage("b", ("beta",), ("a",), _b),
    Stage("c", ("gamma",), ("b",), _c),
)


if __name__ == "__main__":  # used by the SIGKILL test: python toy_pipeline.py CONFIG
    from corrpipe.config import load_config

    cfg = load_config(sys.argv[1], classes=CLASSES)
    run_batch(cfg, stages=STAGES)
