"""Command-line interface: argument parsing only; every command calls the public Python API."""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path
from typing import Sequence

from corrpipe.errors import ConfigError, CorrpipeError
from corrpipe.version import __version__

__all__ = ["main", "build_parser"]

log = logging.getLogger("corrpipe")


def _add_run_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("config", type=Path, help="TOML configuration file")
    p.add_argument("--analysis", action="append", metavar="NAME",
                   help="run only this analysis (repeatable); default: all analyses in the config")


def build_parser() -> argparse.ArgumentParser:
    """Build the ``corrpipe`` argument parser."""
    parser = argparse.ArgumentParser(
        prog="corrpipe",
        description="BAO distance measurements from galaxy catalogues: randoms, pair counts, "
                    "correlation-function multipoles, covariances and template fits.")
    parser.add_argument("--version", action="version", version=f"corrpipe {__version__}")
    verbosity = parser.add_mutually_exclusive_group()
    verbosity.add_argument("-v", "--verbose", action="count", default=0,
                           help="more log output (-vv for debug)")
    verbosity.add_argument("-q", "--quiet", action="store_true",
                           help="only warnings and errors; no progress bars")
    # -v/-q are accepted before or after the command name
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-v", "--verbose", action="count", default=argparse.SUPPRESS,
                        help="more log output (-vv for debug)")
    common.add_argument("-q", "--quiet", action="store_true", default=argparse.SUPPRESS,
                        help="only warnings and errors; no progress bars")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    _add = sub.add_parser

    def add_parser(name, **kw):
        return _add(name, parents=[common], **kw)

    sub.add_parser = add_parser  # type: ignore[method-assign]

    p = sub.add_parser("run", help="run the pipeline of a config (skipping up-to-date stages)",
                       description="Run every stage of every analysis in CONFIG. Stages whose "
                                   "inputs and settings did not change are skipped.")
    _add_run_options(p)
    g = p.add_mutually_exclusive_group()
    g.add_argument("--from", dest="from_stage", metavar="STAGE",
                   help="rerun this stage and all later ones")
    g.add_argument("--only", metavar="STAGE", help="run only this stage")
    p.add_argument("--until", metavar="STAGE", help="stop after this stage")
    p.add_argument("--force", action="store_true", help="rerun every stage")

    p = sub.add_parser("refit", help="rerun only the fit and report on stored pair counts",
                       description="Refit stored estimates (no recounting). With --multipoles, "
                                   "fit an external file of multipoles and covariance instead.")
    p.add_argument("config", type=Path, help="TOML configuration file")
    p.add_argument("--analysis", action="append", metavar="NAME")
    p.add_argument("--multipoles", type=Path, metavar="FILE",
                   help="external multipoles + covariance file (see README, 'External data')")
    p.add_argument("--output", type=Path, metavar="DIR",
                   help="with --multipoles: folder for fit.h5 and summary.json")

    p = sub.add_parser("cosmology", help="fit expansion-history models to the stored BAO fits "
                                         "of a batch ([expansion]); no recount, no refit",
                       description="Fit flat LCDM, wCDM or w0waCDM (optionally with curvature) "
                                   "to the distances of every analysis of CONFIG and to the "
                                   "external files of its [expansion] table.")
    p.add_argument("config", type=Path, help="TOML configuration file")
    p.add_argument("--force", action="store_true", help="rerun even if up to date")

    p = sub.add_parser("status", help="show each stage as done / stale (and why) / missing")
    _add_run_options(p)

    p = sub.add_parser("check", help="validate a config without running anything")
    p.add_argument("config", type=Path)

    sub.add_parser("settings", help="print every config table and key with defaults and ranges")

    p = sub.add_parser("demo", help="make the built-in demo survey and run the whole pipeline on it")
    p.add_argument("--output", type=Path, default=Path("corrpipe_demo"),
                   help="folder for the demo inputs and results (default: ./corrpipe_demo)")
    p.add_argument("--seed", type=int, default=7, help="seed of the demo survey")
    p.add_argument("--survey", choices=("lines", "lowz"), default="lines",
                   help="lines (default): a high-redshift emission-line survey (1.9 < z < 3.5, "
                        "field mosaic with depth classes, line interlopers) in two redshift "
                        "bins plus the expansion-history fit (about 3 minutes on 2 cores; "
                        "BAO ~3 sigma per bin, median of 20 seeds); lowz: a small z ~ 0.45 "
                        "survey in one bin (about 2 minutes; weak, ~2 sigma BAO)")
    p.add_argument("--size", choices=("test", "demo", "large"), default="demo",
                   help="survey size: demo (default); test: a reduced survey that checks the "
                        "chain in seconds (lines only); large: a bigger survey for validation "
                        "runs")

    p = sub.add_parser("mock", help="write box or survey mock catalogues from a TOML file")
    p.add_argument("config", type=Path, help="TOML file with a [mock] table")
    p.add_argument("--output", type=Path, help="output folder (default: beside the config)")
    return parser


def _setup_logging(verbose: int, quiet: bool) -> None:
    level = logging.WARNING if quiet else (logging.DEBUG if verbose > 1 else logging.INFO)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s", force=True)
    if verbose < 2:
        for noisy in ("numba", "matplotlib", "distributed", "h5py"):
            logging.getLogger(noisy).setLevel(logging.WARNING)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``corrpipe`` command; returns the exit code."""
    args = build_parser().parse_args(argv)
    _setup_logging(args.verbose, args.quiet)
    try:
        return _dispatch(args)
    except CorrpipeError as exc:
        print(f"corrpipe: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("corrpipe: interrupted; finished stages are kept, rerun to resume", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into e.g. `head`
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


def _dispatch(args: argparse.Namespace) -> int:
    from corrpipe import api

    progress = not args.quiet
    if args.command == "check":
        cfg = api.check(args.config)
        print(f"{args.config}: valid; analyses: {', '.join(a.name for a in cfg.analyses)}; "
              f"output: {cfg.output}")
        return 0
    if args.command == "settings":
        from corrpipe.config import config_reference

        print(config_reference())
        return 0
    if args.command == "status":
        print(api.status_text(args.config, analyses=args.analysis))
        return 0
    if args.command == "run":
        api.run(args.config, analyses=args.analysis, from_stage=args.from_stage, only=args.only,
                until=args.until, force=args.force, progress=progress, echo=print)
        return 0
    if args.command == "refit":
        if args.multipoles is not None:
            api.refit_external(args.config, args.multipoles, args.output, progress=progress,
                               echo=print)
        else:
            api.refit(args.config, analyses=args.analysis, progress=progress, echo=print)
        return 0
    if args.command == "cosmology":
        api.cosmology(args.config, force=args.force, progress=progress, echo=print)
        return 0
    if args.command == "demo":
        if args.survey == "lowz" and args.size == "test":
            raise ConfigError("corrpipe demo: --size test exists for --survey lines only; "
                              "use --size demo or large with --survey lowz")
        api.demo(args.output, seed=args.seed, scale=args.size, survey=args.survey,
                 progress=progress, echo=print)
        return 0
    if args.command == "mock":
        api.write_mocks(args.config, args.output, progress=progress, echo=print)
        return 0
    raise AssertionError(args.command)  # argparse guarantees a known command


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
