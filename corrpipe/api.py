"""Public entry points: what the CLI calls, usable the same way from Python or a notebook."""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any, Callable, Sequence

from corrpipe.config import RunConfig, load_config
from corrpipe.errors import CheckpointError, InputError, StageError
from corrpipe.pipeline import (BATCH_KEY, batch_status, output_lock, run_analysis, run_batch,
                               stage_status)

__all__ = ["check", "status_text", "run", "refit", "refit_external", "summary", "demo",
           "write_mocks", "cosmology"]

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
    batch = [st for st in batch_status(cfg) if st.state != "disabled"]
    if batch:
        lines.append(f"batch  ({cfg.output})")
        for st in batch:
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
        if name == BATCH_KEY:
            if all(o == "disabled" for o in stages.values()):
                continue
            echo(f"batch: ran {', '.join(ran) if ran else 'nothing (all up to date)'}")
            constraints = cfg.output / "constraints.txt"
            if "cosmology" in stages and constraints.exists():
                echo(constraints.read_text().rstrip())
            continue
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
    cfg = load_config(config)
    result = _fit_external(cfg, Path(multipoles), Path(output) if output else None,
                          progress=progress)
    echo(result["text"])
    return result["summary"]


def cosmology(config: str | Path | RunConfig, *, force: bool = False, progress: bool = True,
              echo: Echo = _quiet) -> dict:
    """Run only the batch-level expansion-history fit on the stored BAO fits.

    Runs whether or not ``[expansion] enabled`` is set, never recounts or refits an analysis,
    skips when its result is up to date (unless ``force``) and resumes an interrupted chain.

    Returns
    -------
    dict
        The contents of ``constraints.json``.

    Raises
    ------
    StageError
        An analysis it reads has no current fit (run the pipeline first).
    """
    import dataclasses

    from corrpipe.pipeline import run_batch_stages
    from corrpipe.stages.cosmology import STAGE

    cfg = config if isinstance(config, RunConfig) else load_config(config)
    stage = dataclasses.replace(STAGE, enabled=lambda c: True)
    outcome = run_batch_stages(cfg, stages=[stage], force=force, show_progress=progress)
    path = cfg.output / "constraints.json"
    text = cfg.output / "constraints.txt"
    echo(f"cosmology: {outcome.get('cosmology', 'not run')}; results in {path}")
    if text.exists():
        echo(text.read_text().rstrip())
    return json.loads(path.read_text())


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
         survey: str = "lines", progress: bool = True, echo: Echo = print) -> dict:
    """Generate a built-in (fictional) demo survey, run the whole pipeline, print truth vs
    recovered.

    ``survey = "lines"`` (default) is the high-redshift emission-line survey of
    :mod:`corrpipe.line_demo` in two redshift bins with the expansion-history fit (``scale``:
    "test", "demo" or "large"; BAO detections about 3 sigma per bin at "demo" size, the
    median of 20 seeds).
    ``survey = "lowz"`` is the single-bin z ~ 0.45 survey of :mod:`corrpipe.demo`
    (``scale``: "demo", about 2 sigma BAO, or "large", about 3 sigma).
    """
    if survey == "lowz":
        return _run_demo(Path(output), seed=seed, scale=scale, progress=progress, echo=echo)
    if survey != "lines":
        raise InputError(f"unknown demo survey {survey!r}; choose 'lines' or 'lowz'")
    return _run_line_demo(Path(output), seed=seed, scale=scale, progress=progress, echo=echo)


def write_mocks(config: str | Path, output: str | Path | None = None, *, progress: bool = True,
                echo: Echo = print) -> list[Path]:
    """Write the mock catalogues a TOML file's ``[mock]`` table describes."""
    return _write_mock_files(Path(config), Path(output) if output else None, progress=progress,
                            echo=echo)


# ----------------------------------------------------------------------------- helpers


def _fit_external(config, path, output=None, *, progress: bool = True) -> dict:
    """Fit an external multipoles + covariance file with the config's ``[fit]`` settings.

    The file formats are those of :func:`corrpipe.fit.external.load_external_multipoles`.
    Results go to ``output`` (default: ``<run output>/external``): ``fit.h5``,
    ``summary.json``, ``summary.txt`` and the plots.

    Returns
    -------
    dict
        ``{"summary": summary dict, "text": text summary}``.
    """
    from corrpipe.checkpoint import write_checkpoint, write_json_atomic, write_text_atomic
    from corrpipe.fit import fit_multipoles
    from corrpipe.stages.common import cosmology_of
    from corrpipe.stages.fit import fit_settings_of
    from corrpipe.fit.external import load_external_multipoles
    from corrpipe.pipeline import file_digest

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
                                cosmology=cosmology_of(analysis), z_eff=float(z_eff),
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


def _run_demo(output, *, seed: int = 7, scale: str = "demo", progress: bool = True,
             echo=print) -> dict:
    """Make the built-in (fictional) demo survey, run the pipeline, compare with the truth.

    Returns
    -------
    dict
        ``{"truth": {...}, "recovered": {...}, "summary": summary.json contents}``.
    """
    import time

    from corrpipe.demo import SURVEY_NAME, TRACER, truth_vs_recovered, write_demo_inputs

    start = time.perf_counter()
    folder = Path(output)
    echo(f"corrpipe demo: {SURVEY_NAME} (fictional), {TRACER}; writing inputs to {folder}")
    inputs = write_demo_inputs(folder, seed=seed, scale=scale, progress=progress)
    echo(f"  {inputs.n_galaxies} galaxies and {inputs.n_randoms} randoms over "
         f"{inputs.area_deg2:.0f} deg^2 ({inputs.seconds:.0f} s); config {inputs.config}")
    cfg = load_config(inputs.config)
    run(cfg, progress=progress, echo=echo)
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


def _run_line_demo(output, *, seed: int = 7, scale: str = "demo", progress: bool = True,
                   echo=print) -> dict:
    """Make the emission-line demo survey, run the batch, compare each bin and the expansion
    history with the truth.

    Returns
    -------
    dict
        ``{"bins": {name: per-quantity truth/median/error/pull/in_95, detection_sigma,
        prior_limited}, "expansion": {...}, "seconds": float}``.
    """
    import time

    from corrpipe.line_demo import (SURVEY_NAME, TRACER, bin_report, expansion_report,
                                    write_line_demo_inputs)

    start = time.perf_counter()
    folder = Path(output)
    echo(f"corrpipe demo: {SURVEY_NAME} (fictional), {TRACER}; writing inputs to {folder}")
    inputs = write_line_demo_inputs(folder, seed=seed, scale=scale, progress=progress)
    echo(f"  {inputs.n_galaxies} objects ({inputs.n_interlopers} of them [O II] interlopers) "
         f"in {inputs.n_fields} fields, {inputs.area_deg2:.0f} deg^2 effective "
         f"({inputs.seconds:.0f} s); config {inputs.config}")
    cfg = load_config(inputs.config)
    run(cfg, progress=progress, echo=echo)
    echo("")
    echo("Truth injected into the demo survey against what the pipeline recovered:")
    out = {"bins": {}}
    for analysis in cfg.analyses:
        summary = json.loads((cfg.analysis_folder(analysis) / "summary.json").read_text())
        text, rows = bin_report(inputs, analysis.name, summary)
        echo(text)
        out["bins"][analysis.name] = rows
    constraints = json.loads((cfg.output / "constraints.json").read_text())
    text, rows = expansion_report(inputs, constraints)
    echo(text)
    out["expansion"] = rows
    out["seconds"] = time.perf_counter() - start
    echo(f"results: {cfg.output} (per bin: summary.json, report/*.png; constraints.json, "
         f"cosmology/*.png); total {out['seconds']:.0f} s")
    return out


def _write_mock_files(config_path, output=None, *, progress: bool = True, echo=print) -> list:
    """Write the mocks a TOML file's ``[mock]`` table describes (``corrpipe mock``)."""
    from corrpipe.config import load_mock_config
    from corrpipe.mocks import write_mocks

    path = Path(config_path)
    settings, fiducial = load_mock_config(path)
    folder = Path(output) if output is not None else path.resolve().parent
    files = write_mocks(settings, folder, fiducial=None if fiducial is None else fiducial.build(),
                        progress=progress, echo=echo)
    return [f.data for f in files]
