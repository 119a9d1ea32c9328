"""Public entry points: what the CLI calls, usable the same way from Python or a notebook."""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any, Callable, Sequence

from corrpipe.config import RunConfig, load_config
from corrpipe.errors import CheckpointError, StageError
from corrpipe.pipeline import output_lock, run_analysis, run_batch, stage_status

__all__ = ["check", "status_text", "run", "refit", "refit_external", "summary", "demo",
           "write_mocks"]

log = logging.getLogger(__name__)

Echo = Callable[[str], Any]


def _quiet(_: str) -> None:
    return None


def check(config: str | Path) -> RunConfig:
    """Validate a configuration file; raise :class:`corrpipe.errors.ConfigError` if invalid."""
    return load_config(config)


def status_text(config: str | Path, analyses: Sequence[str] | None = None) -> str:
    """Human-readable status of every stage of every (or the named) analysis."""
    cfg = load_config(config)
    chosen = [cfg.analysis(n) for n in analyses] if analyses else cfg.analyses
    lines = []
    for a in chosen:
        lines.append(f"analysis '{a.name}'  ({cfg.analysis_folder(a)})")
        for st in stage_status(cfg, a):
            reason = "" if st.state == "done" else f"  {st.reason}"
            lines.append(f"  {st.name:<12} {st.state:<8}{reason}".rstrip())
    return "\n".join(lines)


def run(config: str | Path | RunConfig, *, analyses: Sequence[str] | None = None,
        from_stage: str | None = None, only: str | None = None, until: str | None = None,
        force: bool = False, progress: bool = True, echo: Echo = _quiet) -> dict:
    """Run the pipeline of a configuration; return ``{analysis: {stage: outcome}}``.

    At the end the text summary of every analysis that has a report is passed to ``echo``.
    """
    cfg = config if isinstance(config, RunConfig) else load_config(config)
    outcome = run_batch(cfg, analyses=analyses, from_stage=from_stage, only=only, until=until,
                        force=force, show_progress=progress)
    for name, stages in outcome.items():
        ran = [s for s, o in stages.items() if o == "ran"]
        echo(f"analysis '{name}': ran {', '.join(ran) if ran else 'nothing (all up to date)'}")
        text = _summary_text(cfg, cfg.analysis(name))
        if text:
            echo(text)
    return outcome


def refit(config: str | Path | RunConfig, *, analyses: Sequence[str] | None = None,
          progress: bool = True, echo: Echo = _quiet) -> dict:
    """Rerun only the fit and report stages on stored estimates and covariances.

    Raises
    ------
    StageError
        If the counts, estimate or covariance of an analysis are missing or stale.
    """
    cfg = config if isinstance(config, RunConfig) else load_config(config)
    chosen = [cfg.analysis(n) for n in analyses] if analyses else list(cfg.analyses)
    results = {}
    with output_lock(cfg.output):
        for a in chosen:
            for st in stage_status(cfg, a):
                if st.name in ("load", "randoms", "reconstruct", "counts", "estimate",
                               "covariance") and st.state not in ("done", "disabled"):
                    raise StageError(
                        f"refit of analysis '{a.name}' needs stage '{st.name}', which is "
                        f"{st.state} ({st.reason}); run 'corrpipe run' first — refit never "
                        f"recounts pairs")
            results[a.name] = run_analysis(cfg, a, from_stage="fit", show_progress=progress)
            text = _summary_text(cfg, a)
            if text:
                echo(text)
    return results


def refit_external(config: str | Path, multipoles: str | Path, output: str | Path | None = None,
                   *, progress: bool = True, echo: Echo = _quiet) -> dict:
    """Fit an external file of multipoles + covariance with the config's fit settings."""
    from corrpipe.stages import fit_external

    cfg = load_config(config)
    result = fit_external(cfg, Path(multipoles), Path(output) if output else None,
                          progress=progress)
    echo(result["text"])
    return result["summary"]


def summary(config: str | Path | RunConfig) -> dict:
    """The contents of ``summary.json`` of every analysis that has one."""
    cfg = config if isinstance(config, RunConfig) else load_config(config)
    out = {}
    for a in cfg.analyses:
        path = cfg.analysis_folder(a) / "summary.json"
        if path.exists():
            out[a.name] = json.loads(path.read_text())
    if not out:
        raise CheckpointError(f"no summary.json under {cfg.output}; run the pipeline first")
    return out


def _summary_text(cfg: RunConfig, analysis) -> str:
    path = cfg.analysis_folder(analysis) / "summary.txt"
    return path.read_text().rstrip() if path.exists() else ""


def demo(output: str | Path = "corrpipe_demo", *, seed: int = 7, scale: str = "demo",
         progress: bool = True, echo: Echo = print) -> dict:
    """Generate the built-in demo survey, run the whole pipeline, print truth vs recovered.

    ``scale`` is one of :data:`corrpipe.demo.SCALES` ("demo" by default: median BAO detection
    about 2 sigma per realisation; "large": about 3 sigma).
    """
    from corrpipe.stages import run_demo

    return run_demo(Path(output), seed=seed, scale=scale, progress=progress, echo=echo)


def write_mocks(config: str | Path, output: str | Path | None = None, *, progress: bool = True,
                echo: Echo = print) -> list[Path]:
    """Write the mock catalogues a TOML file's ``[mock]`` table describes."""
    from corrpipe.stages import write_mock_files

    return write_mock_files(Path(config), Path(output) if output else None, progress=progress,
                            echo=echo)
