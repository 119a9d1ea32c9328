"""What a stage declares and what a running stage may use.

A stage module declares one :class:`Stage` (its config tables, the stages it reads, the input
files whose content matters, and ``compute``); the pipeline engine (:mod:`corrpipe.pipeline`)
fingerprints and runs it and hands ``compute`` a context: :class:`StageContext` for a stage of
one analysis, :class:`BatchContext` for a batch-scope stage that reads the results of every
analysis of the batch (e.g. a cosmology fit over the redshift bins).
"""

from __future__ import annotations

import contextlib
import hashlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import h5py

from corrpipe.checkpoint import open_checkpoint

__all__ = ["Stage", "StageContext", "BatchContext", "SCOPES"]

#: ``"analysis"``: runs once per analysis, in the analysis folder; ``"batch"``: runs once per
#: batch, after every analysis, in the batch output folder.
SCOPES = ("analysis", "batch")


@dataclass(frozen=True)
class Stage:
    """Declaration of one pipeline stage.

    Parameters
    ----------
    name : str
        Stage name; its file is ``<name>.h5`` in the analysis folder (batch scope: in the
        batch output folder).
    sections : tuple of str
        Config tables whose values change the stage's output.
    upstream : tuple of str
        Stages whose files this stage reads. For a batch-scope stage: per-analysis stages
        read from *every* analysis of the batch it uses.
    compute : callable
        ``compute(ctx) -> fill`` does the work and returns ``fill(h5file)``, which stores the
        results. Nothing is written to the stage file until ``compute`` returns.
    inputs : callable
        ``inputs(analysis) -> list of paths`` (batch scope: ``inputs(config)``) of input files
        whose content enters the fingerprint.
    enabled : callable
        ``enabled(analysis) -> bool`` (batch scope: ``enabled(config)``); a disabled stage is
        skipped and not fingerprinted.
    extra : callable
        ``extra(analysis) -> dict`` (batch scope: ``extra(config)``) of single settings from
        other tables that the stage also depends on.
    scope : str
        ``"analysis"`` (default) or ``"batch"``; see :data:`SCOPES`.
    analyses : callable
        Batch scope only: ``analyses(config) -> list of analysis names`` the stage reads
        (default: every analysis of the batch).
    """

    name: str
    sections: tuple[str, ...]
    upstream: tuple[str, ...]
    compute: Callable[[Any], Callable[[h5py.File], None]]
    inputs: Callable[[Any], Sequence[str | Path]] = lambda a: ()
    enabled: Callable[[Any], bool] = lambda a: True
    extra: Callable[[Any], dict] = lambda a: {}
    scope: str = "analysis"
    analyses: Callable[[Any], Sequence[str]] | None = None

    def __post_init__(self) -> None:
        if self.scope not in SCOPES:
            raise ValueError(f"stage {self.name!r}: scope must be one of {SCOPES}, "
                             f"got {self.scope!r}")


@dataclass
class StageContext:
    """What a running stage of one analysis may use."""

    stage: Stage
    config: Any
    analysis: Any
    folder: Path
    fingerprint: str
    fingerprints: dict[str, str]
    show_progress: bool = True
    extra: dict[str, Any] = field(default_factory=dict)

    @property
    def progress_path(self) -> Path:
        """Sidecar for partial progress of this stage (deleted when the stage completes)."""
        return self.sidecar()

    def sidecar(self, label: str = "") -> Path:
        """A named partial-progress file of this stage (several if the stage has parts).

        Sidecars belong to the stage's fingerprint: a rerun with other settings discards
        them, and all are deleted once the stage file is written.
        """
        tag = f".{label}" if label else ""
        return self.folder / f".{self.stage.name}.{self.fingerprint[:16]}{tag}.progress.h5"

    def path(self, stage: str) -> Path:
        """File of another stage of this analysis."""
        return self.folder / f"{stage}.h5"

    @contextlib.contextmanager
    def read(self, stage: str) -> Iterator[h5py.File]:
        """Open the (intact, current) file of an upstream stage."""
        with open_checkpoint(self.path(stage), self.fingerprints.get(stage)) as h5:
            yield h5

    def seed(self, salt: str = "") -> int:
        """A seed for this stage derived from the run seed, the analysis name and ``salt``."""
        text = f"{self.config.run.seed}:{self.analysis.name}:{self.stage.name}:{salt}"
        return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little")


@dataclass
class BatchContext:
    """What a running batch-scope stage may use.

    ``fingerprints[analysis][stage]`` holds the current fingerprint of every per-analysis
    stage the batch stage reads; :meth:`read_analysis` opens only such a current file.
    """

    stage: Stage
    config: Any
    analyses: tuple[Any, ...]
    folder: Path
    fingerprint: str
    fingerprints: dict[str, dict[str, str]]
    show_progress: bool = True

    @property
    def progress_path(self) -> Path:
        """Sidecar for partial progress of this stage (deleted when the stage completes)."""
        return self.sidecar()

    def sidecar(self, label: str = "") -> Path:
        """A named partial-progress file of this stage, tied to its fingerprint."""
        tag = f".{label}" if label else ""
        return self.folder / f".{self.stage.name}.{self.fingerprint[:16]}{tag}.progress.h5"

    def analysis_folder(self, name: str) -> Path:
        """Folder of one analysis' stage files."""
        return self.config.analysis_folder(self.config.analysis(name))

    @contextlib.contextmanager
    def read_analysis(self, name: str, stage: str) -> Iterator[h5py.File]:
        """Open the (intact, current) file of stage ``stage`` of analysis ``name``."""
        path = self.analysis_folder(name) / f"{stage}.h5"
        with open_checkpoint(path, self.fingerprints.get(name, {}).get(stage)) as h5:
            yield h5

    def seed(self, salt: str = "") -> int:
        """A seed for this stage derived from the run seed and ``salt``."""
        text = f"{self.config.run.seed}:<batch>:{self.stage.name}:{salt}"
        return int.from_bytes(hashlib.sha256(text.encode()).digest()[:8], "little")
