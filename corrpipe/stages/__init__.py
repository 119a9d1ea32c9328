"""The pipeline's stages, one module each, and their registry in run order.

Per analysis: ``load -> randoms -> [reconstruct] -> counts -> estimate -> covariance -> fit ->
report``; then the batch-scope stages, once per batch over every analysis. Each stage module
declares ``STAGE`` (a :class:`corrpipe.stages.base.Stage`: its config tables, upstream stages,
input files and ``compute``) next to the code that computes it, and ``TABLES``, the config
tables it introduces (table name -> settings dataclass). The numerics live in the numerical
packages; a stage module only reads upstream files, calls them and stores the results.

Adding a stage: write its module here and add it to :data:`STAGE_MODULES`.
"""

from __future__ import annotations

from typing import Any

from corrpipe.stages import (cosmology, counts, covariance, estimate, fit, load, randoms,
                             reconstruct, report)
from corrpipe.stages.base import BatchContext, Stage, StageContext

__all__ = [
    "STAGE_MODULES",
    "STAGES",
    "BATCH_STAGES",
    "Stage",
    "StageContext",
    "BatchContext",
    "config_tables",
    "batch_tables",
    "check_analysis",
]

#: The stage modules in run order (per-analysis stages first, then batch-scope stages).
STAGE_MODULES = (load, randoms, reconstruct, counts, estimate, covariance, fit, report,
                 cosmology)

#: Per-analysis stages in run order.
STAGES: tuple[Stage, ...] = tuple(m.STAGE for m in STAGE_MODULES if m.STAGE.scope == "analysis")

#: Batch-scope stages in run order (they run after every analysis of the batch).
BATCH_STAGES: tuple[Stage, ...] = tuple(m.STAGE for m in STAGE_MODULES
                                        if m.STAGE.scope == "batch")


def config_tables() -> dict[str, type]:
    """Config table name -> settings dataclass of every per-analysis table, in stage order."""
    out: dict[str, type] = {}
    for m in STAGE_MODULES:
        if m.STAGE.scope == "analysis":
            out.update(getattr(m, "TABLES", {}))
    return out


def batch_tables() -> dict[str, type]:
    """Config table name -> settings dataclass of the batch-scope tables (top level only)."""
    out: dict[str, type] = {}
    for m in STAGE_MODULES:
        if m.STAGE.scope == "batch":
            out.update(getattr(m, "TABLES", {}))
    return out


def check_analysis(analysis: Any, where: str) -> None:
    """Run every stage module's checks across tables of one analysis (at config load)."""
    for m in STAGE_MODULES:
        check = getattr(m, "check_analysis", None)
        if check is not None:
            check(analysis, where)
