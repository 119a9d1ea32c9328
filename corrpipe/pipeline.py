"""The stage graph: fingerprints, skip/resume, ``--from/--only/--force`` and the output lock.

A stage is a pure function of its config tables, the outputs of the stages it reads and the
content of the input files it reads. Its *fingerprint* hashes exactly those, so a rerun skips
a stage whose fingerprint matches the one stored in its file and reruns only what is
downstream of a change. This module knows nothing about physics: the stages themselves are
declared in :mod:`corrpipe.stages`.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import json
import logging
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import h5py

from corrpipe.checkpoint import (
    SCHEMA_VERSION,
    checkpoint_state,
    open_checkpoint,
    write_checkpoint,
)
from corrpipe.config import AnalysisConfig, RunConfig
from corrpipe.errors import CorrpipeError, LockError, StageError
from corrpipe.version import __version__

__all__ = [
    "Stage",
    "StageContext",
    "StageStatus",
    "file_digest",
    "stage_status",
    "run_analysis",
    "run_batch",
    "output_lock",
]

log = logging.getLogger(__name__)

LOCK_NAME = ".corrpipe.lock"


@dataclass(frozen=True)
class Stage:
    """Declaration of one pipeline stage.

    Parameters
    ----------
    name : str
        Stage name; its file is ``<name>.h5`` in the analysis folder.
    sections : tuple of str
        Config tables whose values change the stage's output.
    upstream : tuple of str
        Stages whose files this stage reads.
    compute : callable
        ``compute(ctx) -> fill`` does the work and returns ``fill(h5file)``, which stores the
        results. Nothing is written to the stage file until ``compute`` returns.
    inputs : callable
        ``inputs(analysis) -> list of paths`` of input files whose content enters the
        fingerprint.
    enabled : callable
        ``enabled(analysis) -> bool``; a disabled stage is skipped and not fingerprinted.
    extra : callable
        ``extra(analysis) -> dict`` of single settings from other tables that the stage also
        depends on (enter the fingerprint without making the whole table a dependency).
    """

    name: str
    sections: tuple[str, ...]
    upstream: tuple[str, ...]
    compute: Callable[["StageContext"], Callable[[h5py.File], None]]
    inputs: Callable[[AnalysisConfig], Sequence[str | Path]] = lambda a: ()
    enabled: Callable[[AnalysisConfig], bool] = lambda a: True
    extra: Callable[[AnalysisConfig], dict] = lambda a: {}


@dataclass
class StageContext:
    """What a running stage may use."""

    stage: Stage
    config: RunConfig
    analysis: AnalysisConfig
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


@dataclass(frozen=True)
class StageStatus:
    """Status of one stage: ``done``, ``stale``, ``missing``, ``damaged`` or ``disabled``."""

    name: str
    state: str
    reason: str
    fingerprint: str | None


# ----------------------------------------------------------------------------- fingerprints

_DIGEST_CACHE = ".input-digests.json"


def file_digest(path: str | Path, cache_folder: Path | None = None) -> str:
    """SHA-256 of a file's bytes, cached by (size, modification time) in ``cache_folder``."""
    path = Path(path)
    try:
        st = path.stat()
    except FileNotFoundError as exc:
        raise StageError(f"input file {path} does not exist; check the path in the config") from exc
    key = f"{path.resolve()}:{st.st_size}:{st.st_mtime_ns}"
    cache: dict[str, str] = {}
    cache_file = cache_folder / _DIGEST_CACHE if cache_folder is not None else None
    if cache_file is not None and cache_file.exists():
        with contextlib.suppress(OSError, ValueError):
            cache = json.loads(cache_file.read_text())
        if key in cache:
            return cache[key]
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 22), b""):
            digest.update(block)
    value = digest.hexdigest()
    if cache_file is not None and cache_file.parent.exists():
        cache[key] = value
        tmp = cache_file.with_name(cache_file.name + f".tmp-{os.getpid()}")
        with contextlib.suppress(OSError):
            tmp.write_text(json.dumps(cache))
            os.replace(tmp, cache_file)
    return value


def _fingerprint_parts(stage: Stage, analysis: AnalysisConfig, upstream: dict[str, str],
                       cache_folder: Path | None) -> dict[str, Any]:
    inputs = {str(Path(p)): file_digest(p, cache_folder) for p in stage.inputs(analysis)}
    return {
        "stage": stage.name,
        "schema": SCHEMA_VERSION,
        "sections": {s: analysis.section_dict(s) for s in stage.sections},
        "upstream": {u: upstream[u] for u in stage.upstream if u in upstream},
        "inputs": inputs,
        "extra": stage.extra(analysis),
    }


def _hash(parts: dict[str, Any]) -> str:
    text = json.dumps(parts, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode()).hexdigest()


def _expected(stages: Sequence[Stage], analysis: AnalysisConfig, folder: Path
              ) -> tuple[dict[str, str], dict[str, dict]]:
    fps: dict[str, str] = {}
    parts: dict[str, dict] = {}
    for stage in stages:
        if not stage.enabled(analysis):
            continue
        parts[stage.name] = _fingerprint_parts(stage, analysis, fps, folder)
        fps[stage.name] = _hash(parts[stage.name])
    return fps, parts


def _stale_reason(path: Path, parts: dict[str, Any]) -> str:
    """Say what changed, from the fingerprint parts stored in the file."""
    try:
        with h5py.File(path, "r") as h5:
            stored = json.loads(h5.attrs.get("fingerprint_parts", "{}"))
    except (OSError, ValueError):
        return "written with other settings"
    changes = []
    for sec, values in parts["sections"].items():
        old = stored.get("sections", {}).get(sec, {})
        keys = sorted(k for k in set(values) | set(old) if values.get(k) != old.get(k))
        if keys:
            changes.append(f"[{sec}] {', '.join(keys)} changed")
    for up, fp in parts["upstream"].items():
        if stored.get("upstream", {}).get(up) != fp:
            changes.append(f"upstream stage '{up}' changed")
    for p, d in parts["inputs"].items():
        if stored.get("inputs", {}).get(p) != d:
            changes.append(f"input file {p} changed")
    for key, value in parts.get("extra", {}).items():
        if stored.get("extra", {}).get(key) != value:
            changes.append(f"{key} changed")
    if stored.get("schema") != parts["schema"]:
        changes.append("file schema changed")
    return "; ".join(changes) or "written with other settings"


def stage_status(config: RunConfig, analysis: AnalysisConfig,
                 stages: Sequence[Stage] | None = None) -> list[StageStatus]:
    """Return the status of every stage of one analysis, in order."""
    stages = _default_stages(stages)
    folder = config.analysis_folder(analysis)
    fps, parts = _expected(stages, analysis, folder if folder.exists() else None)
    out = []
    upstream_bad: set[str] = set()
    for stage in stages:
        if not stage.enabled(analysis):
            out.append(StageStatus(stage.name, "disabled", "not enabled in the config", None))
            continue
        path = folder / f"{stage.name}.h5"
        state, stored = checkpoint_state(path)
        if state == "missing":
            out.append(StageStatus(stage.name, "missing", "not computed yet", fps[stage.name]))
            upstream_bad.add(stage.name)
        elif state != "ok":
            out.append(StageStatus(stage.name, "damaged", state.split(": ", 1)[-1],
                                   fps[stage.name]))
            upstream_bad.add(stage.name)
        elif stored != fps[stage.name]:
            out.append(StageStatus(stage.name, "stale", _stale_reason(path, parts[stage.name]),
                                   fps[stage.name]))
            upstream_bad.add(stage.name)
        else:
            out.append(StageStatus(stage.name, "done", "up to date", fps[stage.name]))
    return out


# ----------------------------------------------------------------------------- locking


@contextlib.contextmanager
def output_lock(folder: Path) -> Iterator[None]:
    """Hold an exclusive lock on an output folder for the duration of a run.

    The lock is an ``flock`` on a file in the folder, so the kernel releases it when the
    process dies, even by SIGKILL; a stale lock file never blocks a later run.

    Raises
    ------
    LockError
        If another process holds the lock.
    """
    folder.mkdir(parents=True, exist_ok=True)
    lock_path = folder / LOCK_NAME
    fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno not in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                raise
            with contextlib.suppress(OSError):
                holder = Path(lock_path).read_text().strip()
            raise LockError(
                f"output folder {folder} is in use by another corrpipe run ({holder or 'unknown'}); "
                f"wait for it to finish or choose another [run] output") from exc
        os.ftruncate(fd, 0)
        os.write(fd, f"pid {os.getpid()} since {time.strftime('%Y-%m-%d %H:%M:%S')}".encode())
        yield
    finally:
        with contextlib.suppress(OSError):
            fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


# ----------------------------------------------------------------------------- running


def _default_stages(stages: Sequence[Stage] | None) -> Sequence[Stage]:
    if stages is not None:
        return stages
    from corrpipe.stages import STAGES

    return STAGES


def run_analysis(config: RunConfig, analysis: AnalysisConfig, *, from_stage: str | None = None,
                 only: str | None = None, force: bool = False, until: str | None = None,
                 show_progress: bool | None = None, stages: Sequence[Stage] | None = None
                 ) -> dict[str, str]:
    """Run the stages of one analysis, skipping those that are up to date.

    Parameters
    ----------
    config, analysis
        The validated configuration and the analysis to run.
    from_stage : str, optional
        Rerun this stage and every later one even if up to date.
    only : str, optional
        Run only this stage (its upstream stages must be up to date).
    force : bool
        Rerun every stage.
    until : str, optional
        Stop after this stage.
    show_progress : bool, optional
        Progress bars; defaults to ``config.run.progress``.

    Returns
    -------
    dict
        ``{stage: "ran" | "skipped" | "disabled"}``.
    """
    stages = _default_stages(stages)
    names = [s.name for s in stages]
    for opt, value in (("--from", from_stage), ("--only", only), ("--until", until)):
        if value is not None and value not in names:
            from corrpipe.config import _suggest

            raise StageError(f"{opt} {value}: no such stage{_suggest(value, names)}; stages: "
                             f"{', '.join(names)}")
    folder = config.analysis_folder(analysis)
    folder.mkdir(parents=True, exist_ok=True)
    show = config.run.progress if show_progress is None else show_progress
    outcome: dict[str, str] = {}
    fps: dict[str, str] = {}
    rerun_rest = force
    for stage in stages:
        if not stage.enabled(analysis):
            outcome[stage.name] = "disabled"
            continue
        parts = _fingerprint_parts(stage, analysis, fps, folder)
        fp = _hash(parts)
        fps[stage.name] = fp
        path = folder / f"{stage.name}.h5"
        if stage.name == from_stage:
            rerun_rest = True
        state, stored = checkpoint_state(path)
        current = state == "ok" and stored == fp
        if only is not None and stage.name != only:
            if stage.name in _ancestors(stages, only) and not current:
                raise StageError(
                    f"--only {only} needs stage '{stage.name}' of analysis '{analysis.name}', "
                    f"which is {state if state != 'ok' else 'stale'}; run without --only first")
            outcome[stage.name] = "skipped"
            continue
        if current and not rerun_rest and only is None:
            log.info("[%s] %s: up to date, skipped", analysis.name, stage.name)
            outcome[stage.name] = "skipped"
        else:
            if state.startswith("damaged"):
                log.warning("[%s] %s: %s; recomputing", analysis.name, stage.name, state)
            _run_stage(stage, config, analysis, folder, fp, fps, parts, show)
            outcome[stage.name] = "ran"
        if stage.name == until:
            break
    return outcome


def _ancestors(stages: Sequence[Stage], name: str) -> set[str]:
    by_name = {s.name: s for s in stages}
    out: set[str] = set()
    todo = list(by_name[name].upstream)
    while todo:
        u = todo.pop()
        if u in out or u not in by_name:
            continue
        out.add(u)
        todo.extend(by_name[u].upstream)
    return out


def _run_stage(stage: Stage, config: RunConfig, analysis: AnalysisConfig, folder: Path,
               fp: str, fps: dict[str, str], parts: dict[str, Any], show: bool) -> None:
    ctx = StageContext(stage=stage, config=config, analysis=analysis, folder=folder,
                       fingerprint=fp, fingerprints=dict(fps), show_progress=show)
    mine = f".{stage.name}.{fp[:16]}"
    for old in folder.glob(f".{stage.name}.*.progress.h5"):
        if not old.name.startswith(mine):
            old.unlink()
    for tmp in folder.glob(f".{stage.name}.h5.tmp-*"):  # left by a killed run; we hold the lock
        tmp.unlink()
    log.info("[%s] %s: running", analysis.name, stage.name)
    t0 = time.perf_counter()
    try:
        fill = stage.compute(ctx)
    except CorrpipeError:
        raise
    except KeyboardInterrupt:
        raise
    provenance = {
        "config_text": config.text,
        "config_path": str(config.path) if config.path else "",
        "analysis": analysis.name,
        "fingerprint_parts": json.dumps(parts, sort_keys=True, default=str),
        "input_digests": json.dumps(parts["inputs"], sort_keys=True),
        "corrpipe_version": __version__,
    }
    write_checkpoint(folder / f"{stage.name}.h5", stage.name, fp, fill, provenance)
    for done in folder.glob(f"{mine}*.progress.h5"):
        done.unlink()
    log.info("[%s] %s: done in %.1f s", analysis.name, stage.name, time.perf_counter() - t0)


def run_batch(config: RunConfig, *, analyses: Sequence[str] | None = None,
              **kwargs: Any) -> dict[str, dict[str, str]]:
    """Run every analysis of a configuration (or the named ones) under the output lock."""
    chosen = [config.analysis(n) for n in analyses] if analyses else list(config.analyses)
    results = {}
    with output_lock(config.output):
        for analysis in chosen:
            results[analysis.name] = run_analysis(config, analysis, **kwargs)
    return results
