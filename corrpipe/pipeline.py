"""The stage graph: fingerprints, skip/resume, ``--from/--only/--force`` and the output lock.

A stage is a pure function of its config tables, the outputs of the stages it reads and the
content of the input files it reads. Its *fingerprint* hashes exactly those, so a rerun skips
a stage whose fingerprint matches the one stored in its file and reruns only what is
downstream of a change. This module knows nothing about physics: the stages themselves are
declared in :mod:`corrpipe.stages` (one module each; :mod:`corrpipe.stages.base` has the
declaration types). Per-analysis stages run once per analysis in its folder; batch-scope stages
run once per batch, after the analyses, in the batch output folder, and their fingerprint holds
the fingerprints of every analysis result they read.
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
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterator, Sequence

import h5py

from corrpipe.checkpoint import (
    SCHEMA_VERSION,
    checkpoint_state,
    write_checkpoint,
)
from corrpipe.config import AnalysisConfig, RunConfig, suggest
from corrpipe.errors import LockError, StageError
from corrpipe.stages.base import BatchContext, Stage, StageContext
from corrpipe.version import __version__

__all__ = [
    "Stage",
    "StageContext",
    "StageStatus",
    "file_digest",
    "stage_status",
    "batch_status",
    "run_analysis",
    "run_batch",
    "run_batch_stages",
    "output_lock",
    "ensure_folder",
]

log = logging.getLogger(__name__)

LOCK_NAME = ".corrpipe.lock"


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
            # a batch stage's upstream is {analysis: {stage: fingerprint}}
            what = f"results of analysis '{up}'" if isinstance(fp, dict) else f"upstream stage '{up}'"
            changes.append(f"{what} changed")
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


def ensure_folder(folder: Path) -> None:
    """Create an output folder (and its parents) or raise a one-line :class:`StageError`.

    Raises
    ------
    StageError
        If the path (or one of its parents) is an existing file, or the folder cannot be
        created (permissions, read-only file system).
    """
    folder = Path(folder)
    for part in (folder, *folder.parents):
        if part.exists() and not part.is_dir():
            raise StageError(f"output folder {folder}: {part} is an existing file, not a "
                             f"folder; set [run] output to a folder path (or move the file)")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StageError(f"output folder {folder} cannot be created ({exc.strerror}); choose "
                         f"a folder you can write in [run] output") from exc


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
    ensure_folder(folder)
    lock_path = folder / LOCK_NAME
    try:
        fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:
        raise StageError(f"output folder {folder} cannot be written ({exc.strerror}); choose a "
                         f"folder you can write in [run] output") from exc
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


def _default_batch_stages(stages: Sequence[Stage] | None) -> Sequence[Stage]:
    if stages is not None:
        return stages
    from corrpipe.stages import BATCH_STAGES

    return BATCH_STAGES


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
            raise StageError(f"{opt} {value}: no such stage{suggest(value, names)}; stages: "
                             f"{', '.join(names)}")
    folder = config.analysis_folder(analysis)
    ensure_folder(folder)
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
    _execute(stage, ctx, config, analysis.name, folder, fp, parts)


def _execute(stage: Stage, ctx: Any, config: RunConfig, label: str, folder: Path, fp: str,
             parts: dict[str, Any]) -> None:
    """Compute a stage and write its file atomically; remove its finished sidecars."""
    mine = f".{stage.name}.{fp[:16]}"
    for old in folder.glob(f".{stage.name}.*.progress.h5"):
        if not old.name.startswith(mine):
            old.unlink()
    for tmp in folder.glob(f".{stage.name}.h5.tmp-*"):  # left by a killed run; we hold the lock
        tmp.unlink()
    log.info("[%s] %s: running", label, stage.name)
    t0 = time.perf_counter()
    fill = stage.compute(ctx)
    provenance = {
        "config_text": config.text,
        "config_path": str(config.path) if config.path else "",
        "analysis": label,
        "fingerprint_parts": json.dumps(parts, sort_keys=True, default=str),
        "input_digests": json.dumps(parts["inputs"], sort_keys=True),
        "corrpipe_version": __version__,
    }
    write_checkpoint(folder / f"{stage.name}.h5", stage.name, fp, fill, provenance)
    for done in folder.glob(f"{mine}*.progress.h5"):
        done.unlink()
    log.info("[%s] %s: done in %.1f s", label, stage.name, time.perf_counter() - t0)


def run_batch(config: RunConfig, *, analyses: Sequence[str] | None = None,
              stages: Sequence[Stage] | None = None,
              batch_stages: Sequence[Stage] | None = None,
              **kwargs: Any) -> dict[str, dict[str, str]]:
    """Run every analysis of a configuration (or the named ones), then the batch-scope stages,
    under the output lock.

    ``from_stage``, ``only``, ``force`` and ``until`` (see :func:`run_analysis`) may also name a
    batch-scope stage: ``only`` a batch stage runs just that stage on the stored results of
    the analyses (which must be up to date); ``until`` a per-analysis stage skips the batch
    stages. Batch stages whose analyses were not all run or are not up to date are skipped
    with a log line. The batch stages' outcomes appear under the key ``"<batch>"``.
    """
    if batch_stages is None and stages is not None:
        batch_stages = ()  # a caller's own stage list has no batch stages unless it says so
    stages = _default_stages(stages)
    batch_stages = _default_batch_stages(batch_stages)
    batch_names = [s.name for s in batch_stages]
    only, until = kwargs.get("only"), kwargs.get("until")
    from_stage, force = kwargs.get("from_stage"), kwargs.get("force", False)
    chosen = [config.analysis(n) for n in analyses] if analyses else list(config.analyses)
    results: dict[str, dict[str, str]] = {}
    with output_lock(config.output):
        if only not in batch_names:
            per = dict(kwargs)
            for key in ("from_stage", "until"):
                if per.get(key) in batch_names:
                    per[key] = None
            _check_stage_option(stages, batch_names, per)
            for analysis in chosen:
                results[analysis.name] = run_analysis(config, analysis, stages=stages, **per)
        if batch_stages and (until is None or until in batch_names):
            results[BATCH_KEY] = run_batch_stages(
                config, stages=batch_stages, analysis_stages=stages,
                only=only if only in batch_names else None,
                force=force or from_stage in [s.name for s in stages],
                from_stage=from_stage if from_stage in batch_names else None,
                show_progress=kwargs.get("show_progress"), locked=True,
                required=only in batch_names)
    return results


#: Key of the batch-scope stages in the outcome of :func:`run_batch`.
BATCH_KEY = "<batch>"


def _check_stage_option(stages: Sequence[Stage], batch_names: Sequence[str],
                        options: dict[str, Any]) -> None:
    names = [s.name for s in stages] + list(batch_names)
    for opt, key in (("--from", "from_stage"), ("--only", "only"), ("--until", "until")):
        value = options.get(key)
        if value is not None and value not in names:
            raise StageError(f"{opt} {value}: no such stage{suggest(value, names)}; stages: "
                             f"{', '.join(names)}")


def _batch_analyses(stage: Stage, config: RunConfig) -> list[AnalysisConfig]:
    names = stage.analyses(config) if stage.analyses is not None else None
    if not names:
        return list(config.analyses)
    return [config.analysis(n) for n in names]


def _batch_parts(stage: Stage, config: RunConfig, analysis_stages: Sequence[Stage]
                 ) -> tuple[dict[str, Any], dict[str, dict[str, str]], list[str]]:
    """Fingerprint parts of a batch stage, the current fingerprints of the analysis stages it
    reads, and why any of them is not usable (missing/stale/damaged)."""
    upstream: dict[str, dict[str, str]] = {}
    problems: list[str] = []
    for analysis in _batch_analyses(stage, config):
        folder = config.analysis_folder(analysis)
        fps, _ = _expected(analysis_stages, analysis, folder if folder.exists() else None)
        upstream[analysis.name] = {}
        for name in stage.upstream:
            if name not in fps:
                problems.append(f"analysis '{analysis.name}' has no stage '{name}'")
                continue
            state, stored = checkpoint_state(folder / f"{name}.h5")
            if state != "ok":
                problems.append(f"analysis '{analysis.name}': stage '{name}' is "
                                f"{state.split(': ', 1)[0]}")
            elif stored != fps[name]:
                problems.append(f"analysis '{analysis.name}': stage '{name}' is stale")
            upstream[analysis.name][name] = fps[name]
    cache = config.output if config.output.exists() else None
    parts = {
        "stage": stage.name,
        "schema": SCHEMA_VERSION,
        "sections": {s: config.batch_section_dict(s) for s in stage.sections},
        "upstream": upstream,
        "inputs": {str(Path(p)): file_digest(p, cache) for p in stage.inputs(config)},
        "extra": stage.extra(config),
    }
    return parts, upstream, problems


def batch_status(config: RunConfig, stages: Sequence[Stage] | None = None,
                 analysis_stages: Sequence[Stage] | None = None) -> list[StageStatus]:
    """Return the status of every batch-scope stage, in order."""
    stages = _default_batch_stages(stages)
    analysis_stages = _default_stages(analysis_stages)
    out = []
    for stage in stages:
        if not stage.enabled(config):
            out.append(StageStatus(stage.name, "disabled", "not enabled in the config", None))
            continue
        parts, _, problems = _batch_parts(stage, config, analysis_stages)
        fp = _hash(parts)
        path = config.output / f"{stage.name}.h5"
        state, stored = checkpoint_state(path)
        if problems:
            out.append(StageStatus(stage.name, "missing" if state == "missing" else "stale",
                                   "waits for " + "; ".join(problems), fp))
        elif state == "missing":
            out.append(StageStatus(stage.name, "missing", "not computed yet", fp))
        elif state != "ok":
            out.append(StageStatus(stage.name, "damaged", state.split(": ", 1)[-1], fp))
        elif stored != fp:
            out.append(StageStatus(stage.name, "stale", _stale_reason(path, parts), fp))
        else:
            out.append(StageStatus(stage.name, "done", "up to date", fp))
    return out


def run_batch_stages(config: RunConfig, *, stages: Sequence[Stage] | None = None,
                     analysis_stages: Sequence[Stage] | None = None, only: str | None = None,
                     from_stage: str | None = None, force: bool = False,
                     show_progress: bool | None = None, locked: bool = False,
                     required: bool = True) -> dict[str, str]:
    """Run the batch-scope stages on the stored results of the analyses.

    Parameters
    ----------
    only, from_stage, force
        As for :func:`run_analysis`, over the batch stages.
    locked : bool
        The caller already holds the output lock.
    required : bool
        Raise :class:`StageError` when an analysis result a stage reads is missing or stale
        (otherwise the stage is skipped with a log line).

    Returns
    -------
    dict
        ``{stage: "ran" | "skipped" | "disabled" | "waiting"}``.
    """
    stages = _default_batch_stages(stages)
    analysis_stages = _default_stages(analysis_stages)
    names = [s.name for s in stages]
    for opt, value in (("--only", only), ("--from", from_stage)):
        if value is not None and value not in names:
            raise StageError(f"{opt} {value}: no such batch stage{suggest(value, names)}; "
                             f"batch stages: {', '.join(names) or 'none'}")
    show = config.run.progress if show_progress is None else show_progress
    outcome: dict[str, str] = {}
    lock = contextlib.nullcontext() if locked else output_lock(config.output)
    with lock:
        rerun_rest = force
        for stage in stages:
            if only is not None and stage.name != only:
                continue
            if not stage.enabled(config):
                outcome[stage.name] = "disabled"
                continue
            if stage.name == from_stage:
                rerun_rest = True
            parts, upstream, problems = _batch_parts(stage, config, analysis_stages)
            if problems:
                message = (f"batch stage '{stage.name}' needs the stored results of the "
                           f"analyses: {'; '.join(problems)}; run 'corrpipe run' on the config "
                           f"first")
                if required:
                    raise StageError(message)
                log.warning("%s; skipped", message)
                outcome[stage.name] = "waiting"
                continue
            fp = _hash(parts)
            path = config.output / f"{stage.name}.h5"
            state, stored = checkpoint_state(path)
            if state == "ok" and stored == fp and not rerun_rest and only is None:
                log.info("[batch] %s: up to date, skipped", stage.name)
                outcome[stage.name] = "skipped"
                continue
            if state.startswith("damaged"):
                log.warning("[batch] %s: %s; recomputing", stage.name, state)
            ctx = BatchContext(stage=stage, config=config,
                               analyses=tuple(_batch_analyses(stage, config)),
                               folder=config.output, fingerprint=fp, fingerprints=upstream,
                               show_progress=show)
            _execute(stage, ctx, config, "<batch>", config.output, fp, parts)
            outcome[stage.name] = "ran"
    return outcome
