"""Command line: ``quakefolio run|hazard|check CONFIG``.

User errors (bad input files or config) exit with status 2 and one line naming file,
row and column; no traceback unless ``--debug``.  ``check`` and ``--help`` never start
Prefect.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from quakefolio.pipeline.env import configure_prefect

__all__ = ["main"]

EXIT_USER_ERROR = 2
EXIT_INTERNAL = 1


def _parser():
    p = argparse.ArgumentParser(
        prog="quakefolio",
        description="Earthquake damage and loss for building portfolios (screening level).",
    )
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    run = sub.add_parser("run", help="run the full pipeline for CONFIG and store a new run")
    run.add_argument("config", help="run config file (quakefolio.toml)")
    run.add_argument("--quiet", action="store_true", help="print only the run folder")
    run.add_argument("--no-flow", action="store_true",
                     help="run the same stages without Prefect orchestration (no embedded server)")
    hzd = sub.add_parser("hazard", help="run the hazard stage only (curves, return-period values, disaggregation)")
    hzd.add_argument("config", help="run config file (quakefolio.toml)")
    hzd.add_argument("--quiet", action="store_true", help="print only the run folder")
    hzd.add_argument("--no-flow", action="store_true", help="run without Prefect orchestration")
    chk = sub.add_parser("check", help="validate CONFIG and every input file it names; write nothing")
    chk.add_argument("config", help="run config file (quakefolio.toml)")
    for sp in (run, hzd, chk):
        sp.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    return p


def _check(args):
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.stages import load_inputs, plan_blocks

    inputs = load_inputs(args.config)
    blocks = plan_blocks(inputs)
    n_pairs = sum(len(b.sites) for b in blocks)
    print(CAUTION)
    print(f"OK: {args.config}: {len(inputs.exposure)} assets, {inputs.exposure.building_class.nunique()} classes, "
          f"{len(inputs.hazard.site_id)} hazard sites, {n_pairs} unique (site, class) pairs")
    for w in inputs.warnings:
        print(f"note: {w}")
    return 0


def _run(args, stages_to_run="all"):
    from quakefolio.pipeline.stages import load_inputs
    from quakefolio.pipeline.summary import summary_text

    t0 = time.perf_counter()
    inputs = load_inputs(args.config)  # validate before starting any orchestration: bad input writes nothing
    if args.no_flow:
        from quakefolio.pipeline.runner import run_pure

        run_dir = run_pure(inputs, stages_to_run=stages_to_run)
    else:
        configure_prefect()
        from quakefolio.pipeline.flow import run_flow

        run_dir = run_flow(Path(args.config).resolve(), max_workers=inputs.config["execution"]["max_workers"],
                           stages_to_run=stages_to_run)
    elapsed = time.perf_counter() - t0
    if args.quiet:
        print(run_dir)
    else:
        print(summary_text(run_dir, elapsed_s=elapsed))
    return 0


def _hazard(args):
    return _run(args, stages_to_run="hazard")


def main(argv=None):
    args = _parser().parse_args(argv)
    from quakefolio.core.errors import InputError

    try:
        return {"run": _run, "hazard": _hazard, "check": _check}[args.command](args)
    except InputError as exc:
        if args.debug:
            raise
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - last line of defence for the CLI
        if args.debug:
            raise
        print(f"internal error: {type(exc).__name__}: {exc} (rerun with --debug for a traceback)", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
