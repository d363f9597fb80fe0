"""Command line: ``quakefolio run|hazard|check CONFIG``, ``quakefolio compare RUN_A RUN_B``,
``quakefolio report|export RUN``, ``quakefolio history OUTPUT`` and ``quakefolio scenario CONFIG SCENARIO``.

User errors (bad input files or config) exit with status 2 and one line naming file,
row and column; no traceback unless ``--debug``.  ``check`` and ``--help`` never start
Prefect.

Exit statuses (:func:`main`): 0 done; 1 a stage failed for an internal reason (one line
naming the stage and the cause); 2 a problem the user can fix: bad input, an output
folder that cannot be written (permission denied, read-only file system) or a full disk
(the line names the stage and the path), or a Dask scheduler address that does not answer
as a Dask scheduler; 130 Ctrl-C; 143 SIGTERM (handled as Ctrl-C: the run stops, nothing
half-written is kept; a Prefect server this command was still starting is stopped, one
already running is left for the next command).  ``quakefolio server status|stop`` shows or
stops the shared local Prefect server.  In the Prefect
path, Prefect's own log records go to the run's log file
(:mod:`quakefolio.pipeline.runlog`), named on the error line, never to the terminal.
Everything printed shows control characters escaped (:mod:`quakefolio.pipeline.terminal`).
"""
from __future__ import annotations

import argparse
import errno
import signal
import sys
import time
from pathlib import Path

from quakefolio.pipeline.env import configure_prefect

# Names from user files may carry terminal escape sequences: every line this module prints
# goes through the one sanitising printer (control characters shown as \x1b, \r ...).
from quakefolio.pipeline.terminal import echo as print  # noqa: A004
from quakefolio.pipeline.terminal import one_line

__all__ = ["main", "command"]

EXIT_USER_ERROR = 2
EXIT_INTERNAL = 1
EXIT_INTERRUPTED = 130
EXIT_TERMINATED = 143  # 128 + SIGTERM

#: errno values of an OSError the user can fix (a folder not writable, a full disk): exit 2
_USER_ERRNOS = {errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOSPC, errno.EDQUOT}


def _count(text):
    try:
        n = int(text)
    except ValueError:
        n = -1
    if n < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative integer, got {text!r}")
    return n


def _parser():
    p = argparse.ArgumentParser(
        prog="quakefolio",
        description="Earthquake damage and loss for building portfolios (screening level).",
    )
    p.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    p.add_argument("--version", action="version", version=f"quakefolio {_version()}")
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
    for sp in (run, hzd):
        sp.add_argument("--always-flow", action="store_true",
                        help="run the Prefect flow even when every stage's result is in the cache (by default "
                             "such a run is written without a flow run)")
    for sp in (run, hzd):
        scale = sp.add_argument_group("scale-out (overrides [execution] backend and address)")
        scale.add_argument("--executor", choices=("local", "dask"),
                           help="local: threads of this process; dask: block tasks on a Dask cluster")
        scale.add_argument("--address", type=_dask_address, metavar="tcp://HOST:PORT",
                           help="scheduler of an existing Dask cluster (implies --executor dask); without it "
                                "--executor dask starts a local cluster of 2 worker processes on 127.0.0.1")
    sch = sub.add_parser(
        "schedule", help="rerun CONFIG on a cron schedule (a deployment served on a local Prefect server)",
        description="Create or update a deployment of the flow for CONFIG with a cron schedule on a local Prefect "
                    "server (started on 127.0.0.1 with its database in the state folder, or the one already "
                    "running there, or PREFECT_API_URL), then serve it until interrupted. Each scheduled run first "
                    "compares a digest of every input file and the resolved config with the LATEST run: if nothing "
                    "changed it writes nothing; otherwise it stores a new run and the change report against the "
                    "previous one. For a plain alternative, let the system's cron call 'quakefolio run CONFIG'.")
    sch.add_argument("config", help="run config file (quakefolio.toml)")
    sch.add_argument("--cron", required=True, metavar="EXPR",
                     help="five-field cron expression, e.g. \"0 3 * * 1\" (Mondays 03:00)")
    sch.add_argument("--timezone", default="UTC", metavar="TZ",
                     help="IANA time zone of the cron fields (default UTC)")
    sch.add_argument("--run-once", action="store_true",
                     help="create or update the deployment, run it once now, and exit (no waiting for the clock)")
    chk = sub.add_parser("check", help="validate CONFIG and every input file it names; write nothing")
    chk.add_argument("config", help="run config file (quakefolio.toml)")
    cmp = sub.add_parser("compare", help="change report between two runs: what moved per asset and portfolio, and why",
                         description="Compare two finished runs. RUN_A and RUN_B are run folders "
                                     "(<output>/runs/<run_id>) or output folders, which stand for their LATEST run. "
                                     "The report goes to <output folder of RUN_B>/comparisons/<run_a_id>__<run_b_id>/; "
                                     "neither run is modified.")
    cmp.add_argument("run_a", metavar="RUN_A", help="the earlier run (run folder or output folder)")
    cmp.add_argument("run_b", metavar="RUN_B", help="the later run (run folder or output folder)")
    cmp.add_argument("--out", metavar="DIR", help="write the report folder <run_a_id>__<run_b_id>/ under DIR instead")
    cmp.add_argument("--top", metavar="N", type=_count, default=10,
                     help="list the N assets with the largest absolute EAL change (default 10)")
    rep = sub.add_parser("report", help="write the HTML report of a finished run (the run itself is not modified)",
                         description="Write the self-contained HTML report of RUN, a run folder (<output>/runs/<run_id>) "
                                     "or an output folder, which stands for its LATEST run. Finished runs are never "
                                     "modified: the report goes to <output folder>/reports/<run_id>.html unless --out "
                                     "names another file. Prints the path written.")
    rep.add_argument("run", metavar="RUN", help="the run to report (run folder or output folder)")
    rep.add_argument("--previous", metavar="RUN", help="an earlier run to compare with (adds the change report)")
    rep.add_argument("--out", metavar="FILE", help="write the report to FILE instead")
    exp = sub.add_parser(
        "export", help="write the per-asset and per-site tables of a run as GeoParquet, GeoJSON or CSV",
        description="Export every table of RUN that places its rows (per asset or per hazard site, with lon and lat "
                    "in WGS84 degrees) to one file per table: GeoParquet (point geometry as WKB, GeoParquet 1.0 "
                    "metadata), GeoJSON (RFC 7946) or CSV. RUN is a run folder or an output folder, which stands for "
                    "its LATEST run. The files go to a new folder, <output folder>/exports/<run_id>-<format>/ unless "
                    "--out names another; nothing existing is overwritten and the run is not modified.")
    exp.add_argument("run", metavar="RUN", help="the run to export (run folder or output folder)")
    exp.add_argument("--format", dest="export_format", choices=("geoparquet", "geojson", "csv"), default="geoparquet",
                     help="file format (default geoparquet)")
    exp.add_argument("--out", metavar="DIR", help="write the files into DIR, a new or empty folder")
    his = sub.add_parser(
        "history", help="list the finished runs of an output folder with headline figures and what changed",
        description="List the finished runs of OUTPUT (oldest first) with the classical EAL, the event-based AAL, "
                    "the PML at each configured return period and the expected number of collapses, the input files "
                    "that changed since the run before and the change of each figure in percent. The table is also "
                    "written to OUTPUT/history.parquet (replacing an earlier one).")
    his.add_argument("output", metavar="OUTPUT", help="an output folder (holding runs/)")
    scn = sub.add_parser(
        "scenario", help="damage and loss of given earthquakes: many realisations of correlated ground motion",
        description="Run the ruptures of SCENARIO (a scenario file: ruptures of the source model by source id, or "
                    "ruptures of their own; realisations, seed, percentiles, optional station file) on the "
                    "portfolio, fragility library and hazard model of CONFIG (compute mode). Optionally condition "
                    "the fields on recorded intensities at stations. The tables and report go to a new run folder "
                    "under <[output] folder>/scenarios/runs/; the portfolio runs are left as they are.")
    scn.add_argument("config", help="run config file (quakefolio.toml)")
    scn.add_argument("scenario", metavar="SCENARIO", help="scenario file (TOML)")
    scn.add_argument("--realisations", type=_count, metavar="N", help="realisations per rupture (overrides the file)")
    scn.add_argument("--stations", metavar="FILE", help="station file (CSV or Parquet) overriding the scenario file's")
    scn.add_argument("--station-sigma", type=_non_negative_number, default=0.0, metavar="S",
                     help="measurement standard deviation [ln units] of records without sigma_ln (default 0)")
    scn.add_argument("--quiet", action="store_true", help="print only the run folder")
    fit = sub.add_parser(
        "fit-fragility", help="fit a lognormal fragility function to structural-analysis results",
        description="Fit median and beta of a lognormal fragility function to multiple-stripe analysis results "
                    "(columns im, n_records, n_exceed) or incremental dynamic analysis results (column "
                    "im_at_failure; leave it empty for records that did not fail up to the largest IM run and "
                    "give --im-max or a column im_max). IM values in g.")
    fit.add_argument("data", metavar="DATA", help="CSV or Parquet file of analysis results")
    fit.add_argument("--method", choices=("msa", "ida", "ida-truncated"),
                     help="kind of results (default: told by the columns and by empty im_at_failure cells)")
    fit.add_argument("--im-max", type=_positive_number, metavar="X",
                     help="largest IM [g] run for records that did not fail (truncated IDA)")
    fit.add_argument("--extra-beta", type=_non_negative_number, default=0.0, metavar="B",
                     help="extra dispersion combined by square root of sum of squares into beta_total")
    fit.add_argument("--json", action="store_true", help="print one JSON object (the caution goes to stderr)")
    lib = fit.add_argument_group("write the fit (median, beta_total) into a fragility library")
    lib.add_argument("--write-library", metavar="FILE", help="fragility library TOML file to update or create")
    lib.add_argument("--class", dest="class_code", metavar="CODE", help="building class to update or create")
    lib.add_argument("--state", metavar="NAME", help="damage state to add or replace")
    lib.add_argument("--mean-damage-ratio", type=_non_negative_number, metavar="R",
                     help="mean damage ratio of the state (required for a new state)")
    lib.add_argument("--cov", type=_non_negative_number, metavar="C", help="CoV of the state's loss ratio")
    lib.add_argument("--im", metavar="IM", help="IM of the fit, e.g. SA_1.0 (required for a new class)")
    srv = sub.add_parser(
        "server", help="status or stop of the local Prefect server shared by commands",
        description="The local Prefect server (127.0.0.1, database in the state folder) is started by the first "
                    "command that needs it and reused by later ones; it stops after QUAKEFOLIO_SERVER_IDLE_S "
                    "seconds unused (default 1800) or with 'server stop'.")
    srv.add_argument("action", choices=("status", "stop"), help="status: print where it runs; stop: stop it now")
    for sp in (sch, run, hzd, chk, cmp, rep, exp, his, fit, srv, scn):
        # SUPPRESS: a --debug given before the command is not reset by the command's default
        sp.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks on errors")
    return p


def _version():
    from importlib import metadata

    try:
        return metadata.version("quakefolio")
    except metadata.PackageNotFoundError:  # a source tree that is not installed
        import tomllib

        try:
            with open(Path(__file__).resolve().parents[1] / "pyproject.toml", "rb") as fh:
                return tomllib.load(fh)["project"]["version"]
        except (OSError, KeyError, ValueError):
            return "unknown"


def _dask_address(text):
    from quakefolio.pipeline.io.config import _dask_address as problem_with

    if not text or problem_with(text):
        raise argparse.ArgumentTypeError(f"expected a Dask scheduler address such as 'tcp://10.0.0.5:8786', "
                                         f"got {text!r}")
    return text


def _positive_number(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 < v < float("inf"):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def _non_negative_number(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 <= v < float("inf"):
        raise argparse.ArgumentTypeError(f"expected a non-negative number, got {text!r}")
    return v


def _check(args):
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.stages import load_inputs

    inputs = load_inputs(args.config)
    n_pairs = inputs.work.n_pairs
    print(CAUTION)
    print(f"OK: {args.config}: {len(inputs.exposure)} assets, {inputs.exposure.building_class.nunique()} classes, "
          f"{len(inputs.hazard.site_id)} hazard sites, {n_pairs} unique (site, class) pairs")
    print(inputs.work.summary())
    _print_notes(inputs.warnings, notes=True)
    return 0


def _print_notes(warnings, *, notes):
    """Located input warnings as ``warning: ...`` lines on stderr; with ``notes``, plain notes on stdout."""
    from quakefolio.core.errors import InputWarning

    for w in warnings:
        if isinstance(w, InputWarning):
            print(f"warning: {one_line(w)}", file=sys.stderr)
        elif notes:
            print(f"note: {one_line(w)}")


#: Exposure files from this size on [bytes] (about 40,000 buildings) are read on the flow path while
#: Prefect is imported in the background (:func:`quakefolio.pipeline.env.import_prefect_meanwhile`);
#: below it reading takes less than the import, and an unchanged rerun, which needs no Prefect, would
#: pay for it.
IMPORT_PREFECT_MEANWHILE_BYTES = 4 << 20


def _import_prefect_meanwhile(args, config):
    """The thread importing Prefect while a large exposure is read for a local flow run, or None."""
    import os

    from quakefolio.pipeline.env import import_prefect_meanwhile

    if args.no_flow or "prefect" in sys.modules:
        return None
    try:
        backend, _ = _backend(args, config)
        size = os.path.getsize(config.exposure.file)
    except Exception:  # noqa: BLE001 - reported where the run meets it again
        return None
    if backend != "local" or size < IMPORT_PREFECT_MEANWHILE_BYTES:
        return None
    return import_prefect_meanwhile(log_to=config.output.folder)


def _run(args, stages_to_run="all"):
    from quakefolio.pipeline.io.config import load_config
    from quakefolio.pipeline.stages import load_inputs
    from quakefolio.pipeline.summary import summary_text

    from quakefolio.pipeline.progress import StageProgress

    t0 = time.perf_counter()
    config = load_config(args.config)
    importing = _import_prefect_meanwhile(args, config)
    try:
        inputs = load_inputs(config)  # validate before starting any orchestration: bad input writes nothing
    finally:
        if importing is not None:
            importing.join()
    backend, address = _backend(args, inputs.config)
    _print_notes(inputs.warnings, notes=False)  # the notes come with the summary
    with StageProgress(enabled=sys.stderr.isatty() and not args.quiet):
        if backend == "dask":
            configure_prefect(log_to=inputs.config.output.folder)  # Prefect's records to the run's log file
            from quakefolio.pipeline.orchestration import run_on_dask

            run_dir = run_on_dask(Path(args.config).resolve(), address, stages_to_run=stages_to_run, inputs=inputs)
        elif args.no_flow:
            from quakefolio.pipeline.runner import run_pure

            run_dir = run_pure(inputs, stages_to_run=stages_to_run)
        else:
            run_dir = _run_flow_shared(args.config, inputs, stages_to_run, always=args.always_flow)
    elapsed = time.perf_counter() - t0
    if args.quiet:
        print(run_dir)
    else:
        print(summary_text(run_dir, elapsed_s=elapsed))
    return 0


def _run_flow_shared(config, inputs, stages_to_run, always=False):
    """The flow in this process, reporting to the shared local Prefect server (found running or started).

    When a run of the same inputs and code completed before (every stage's result is in the
    content cache), the run is written without a flow run and without Prefect: nothing is
    computed, so there is nothing to orchestrate; the manifest says so.  ``always``
    (``--always-flow``) runs the flow all the same.
    """
    if not always:
        from quakefolio.pipeline.reuse import FROM_CACHE, reuse_finished_run

        run = reuse_finished_run(inputs, stages_to_run, orchestration=FROM_CACHE)  # no stage runs
        if run is not None:
            return run
        from quakefolio.pipeline.runner import every_stage_cached, run_pure

        if every_stage_cached(inputs, stages_to_run):  # the earlier run is gone: its stages' results are cached
            return run_pure(inputs, stages_to_run=stages_to_run, orchestration=FROM_CACHE)
    configure_prefect(log_to=inputs.config.output.folder)
    from quakefolio.pipeline.server import use_server

    with use_server() as server:
        from quakefolio.pipeline.orchestration import using_api

        with using_api(server.url):  # before Prefect is imported: its settings then name the server as they are
            from quakefolio.pipeline.flow import run_flow

            return run_flow(Path(config).resolve(), max_workers=inputs.config.execution.max_workers,
                            stages_to_run=stages_to_run, inputs=inputs)


def _server(args):
    from quakefolio.pipeline.server import ServerError, server_status, stop_recorded

    if args.action == "status":
        print(server_status())
        return 0
    try:
        print(stop_recorded())
    except ServerError as exc:
        print(f"error: server stop: {exc}", file=sys.stderr)
        return EXIT_INTERNAL
    return 0


def _backend(args, config):
    """(backend, address): the config's [execution], overridden by --executor / --address."""
    from quakefolio.core.errors import InputError
    from quakefolio.pipeline.io.config import resolve_execution

    if args.executor == "local" and args.address:
        raise InputError("--address", "applies to --executor dask, not --executor local")
    if args.no_flow and args.always_flow:
        raise InputError("--always-flow", "runs the Prefect flow; it cannot be combined with --no-flow")
    if args.no_flow and (args.executor == "dask" or args.address):
        raise InputError("--no-flow", "runs without Prefect in this process; it cannot be combined with "
                                      "--executor dask or --address")
    if args.no_flow:
        return "local", ""
    return resolve_execution(config, args.executor, args.address)


def _schedule(args):
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.stages import load_inputs

    load_inputs(args.config)  # validate before starting a server: a bad input starts nothing
    configure_prefect()
    from quakefolio.pipeline.scheduling import check_cron, serve_schedule
    from quakefolio.pipeline.server import use_server

    problem = check_cron(args.cron, args.timezone)
    if problem:
        print(f"error: schedule: --cron {args.cron!r} --timezone {args.timezone!r}: {problem}", file=sys.stderr)
        return EXIT_USER_ERROR
    print(CAUTION)
    with use_server() as server:  # left running for later commands; stopped when idle or by 'server stop'
        where = f"{server.url}" + (f" (database {server.database})" if server.database else "")
        print(f"using the Prefect server at {where}", flush=True)
        out = serve_schedule(Path(args.config).resolve(), args.cron, api_url=server.url, timezone=args.timezone,
                             run_once=args.run_once)
    if not args.run_once:
        return 0
    print(f"deployment {out['deployment']}: run {out['flow_run_id']} finished {out['state']}")
    return 0 if out["state"] == "Completed" else EXIT_INTERNAL


def _hazard(args):
    return _run(args, stages_to_run="hazard")


def _compare(args):
    from quakefolio.pipeline.compare import change_summary_text, compare_runs, write_change_report

    result = compare_runs(args.run_a, args.run_b)
    folder = write_change_report(args.run_a, args.run_b, out_dir=args.out, result=result)
    print(change_summary_text(result, folder, top_n=args.top))
    return 0


def _report(args):
    from quakefolio.pipeline.compare import resolve_run
    from quakefolio.pipeline.report import default_report_file, output_cache, report_target, write_report

    run = resolve_run(args.run)
    previous = resolve_run(args.previous) if args.previous else None
    out = report_target(args.out or default_report_file(run), runs=(run, previous))  # new, or an earlier report
    print(write_report(run, out, previous_run=previous, cache=output_cache(run)))  # unchanged sections from the cache
    return 0


def _export(args):
    from quakefolio.pipeline.export import export_run

    folder, written, left = export_run(args.run, args.export_format, args.out)
    for name, rows in written:
        print(f"{folder / name}  ({rows} rows)")
    if left:
        print(f"note: left out (the run stores no positions for their rows): {', '.join(left)}")
    print(f"{len(written)} files written to {folder}")
    return 0


def _history(args):
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.history import history_text, run_history, write_history

    frame, currency = run_history(args.output)
    path = write_history(args.output, frame, currency)
    print(CAUTION)
    print(history_text(frame, currency, path))
    return 0


def _scenario(args):
    from quakefolio.core.errors import InputError
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.scenario_run import run_scenario_files

    if args.realisations == 0:
        raise InputError("--realisations", "expected an integer >= 1, got 0")
    run_dir, warnings, product = run_scenario_files(args.config, args.scenario, realisations=args.realisations,
                                                    stations=args.stations, station_sigma_ln=args.station_sigma)
    _print_notes(warnings, notes=False)
    if args.quiet:
        print(run_dir)
        return 0
    print(CAUTION)
    pf = product.tables["scenario_portfolio_loss"]
    rows = pf[(pf.scope == "portfolio") & (pf.metric == "ground_up_loss")]
    for r in rows.itertuples():
        print(f"rupture {r.rupture_id}: portfolio ground-up loss mean {r.mean:,.0f}, median {r.p50:,.0f}, "
              f"90% {r.p90:,.0f}, 99% {r.p99:,.0f} over {r.realisations} realisations"
              + (" (conditioned on stations)" if product.conditioned else ""))
    print(f"run folder: {run_dir}")
    if (run_dir / "report.html").exists():
        print(f"report: {run_dir / 'report.html'}")
    return 0


def _fit_fragility(args):
    import json

    from quakefolio.core.errors import InputError
    from quakefolio.fragility import fitting
    from quakefolio.pipeline.caution import CAUTION
    from quakefolio.pipeline.io.fit_data import read_fit_data, write_fitted_state

    if args.write_library:
        missing = [opt for opt, v in (("--class", args.class_code), ("--state", args.state)) if not v]
        if missing:
            print(f"error: fit-fragility: --write-library needs {' and '.join(missing)}", file=sys.stderr)
            return EXIT_USER_ERROR
    else:
        given = [opt for opt, v in (("--class", args.class_code), ("--state", args.state), ("--im", args.im),
                                    ("--mean-damage-ratio", args.mean_damage_ratio), ("--cov", args.cov))
                 if v is not None]
        if given:
            print(f"error: fit-fragility: {', '.join(given)} only apply with --write-library FILE", file=sys.stderr)
            return EXIT_USER_ERROR
    method, data = read_fit_data(args.data, args.method, args.im_max)
    fitter = {"msa": fitting.fit_msa, "ida": fitting.fit_ida, "ida-truncated": fitting.fit_ida_truncated}[method]
    try:
        fit = fitter(**data, beta_extra=args.extra_beta)
    except ValueError as exc:
        raise InputError(args.data, str(exc), column="n_exceed" if method == "msa" else "im_at_failure") from None
    if args.json:
        print(CAUTION, file=sys.stderr)
        print(json.dumps(fit.to_dict(), allow_nan=False))
    else:
        print(CAUTION)
        print("\n".join(fit.summary_lines(source=args.data)))
    if args.write_library:
        lines = write_fitted_state(args.write_library, args.class_code, args.state, fit, data_path=args.data,
                                   mean_damage_ratio=args.mean_damage_ratio, cov=args.cov, im=args.im)
        print("\n".join(lines), file=sys.stderr if args.json else sys.stdout)
    return 0


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised in the main thread so that the command unwinds as on Ctrl-C.

    A subclass of ``KeyboardInterrupt``: every stage, the run writer and Prefect treat it as
    an interruption (nothing half-written is kept; the embedded Prefect server is stopped
    when the process exits).
    """


def _raise_terminated(signum, frame):
    raise Terminated()


def _set_sigterm(handler):
    """Install ``handler`` for SIGTERM; the handler before, or None outside the main thread."""
    try:
        return signal.signal(signal.SIGTERM, handler)
    except ValueError:  # signals can only be set from the main thread
        return None


def _user_os_error(exc):
    """The OSError behind ``exc`` (itself or a failed stage's cause) when the user can fix it, else None."""
    cause = getattr(exc, "cause", exc)
    return cause if isinstance(cause, OSError) and cause.errno in _USER_ERRNOS else None


def _failure(exc):
    """(exit status, one line) for the exception that ends a command."""
    from quakefolio.core.errors import InputError
    from quakefolio.pipeline.runlog import current_log
    from quakefolio.pipeline.runner import StageError

    if isinstance(exc, Terminated):
        return EXIT_TERMINATED, "terminated (SIGTERM)"
    if isinstance(exc, KeyboardInterrupt):
        return EXIT_INTERRUPTED, "interrupted"
    if isinstance(exc, InputError):
        return EXIT_USER_ERROR, f"error: {exc}"
    os_error = _user_os_error(exc)
    if isinstance(exc, StageError):
        status, line = (EXIT_USER_ERROR if os_error else EXIT_INTERNAL), f"error: {exc}"
    elif os_error is not None:
        where = f"{os_error.filename}: " if os_error.filename else ""
        status, line = EXIT_USER_ERROR, f"error: {where}{os_error.strerror or os_error}"
    else:
        status, line = EXIT_INTERNAL, (f"internal error: {type(exc).__name__}: {exc} "
                                       f"(rerun with --debug for a traceback)")
    log = current_log()
    return status, line + (f"; Prefect log: {log}" if log is not None else "")


def main(argv=None):
    """The ``quakefolio`` command: parse ``argv``, run the subcommand, map errors to exit codes.

    A user-input error prints ``error: <message>`` (file, row and column) on stderr and
    returns 2, and so does a stage that could not write (permission denied, read-only file
    system, disk full: the line names the stage and the path); any other failure prints one
    line naming the stage and the cause and returns 1; Ctrl-C returns 130 and SIGTERM 143
    (both stop the run as an interruption).  Every line is printed with control characters
    escaped.  With ``--debug`` the exception is raised instead (a traceback).

    Parameters
    ----------
    argv : list of str, optional
        Command-line arguments without the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        Exit status: 0 on success, 2 (:data:`EXIT_USER_ERROR`), 1 (:data:`EXIT_INTERNAL`),
        130 (:data:`EXIT_INTERRUPTED`) or 143 (:data:`EXIT_TERMINATED`).
    """
    args = _parser().parse_args(argv)
    _ran["command"] = args.command
    handlers = {"run": _run, "hazard": _hazard, "check": _check, "compare": _compare, "report": _report,
                "fit-fragility": _fit_fragility, "schedule": _schedule, "export": _export, "history": _history,
                "server": _server, "scenario": _scenario}
    before = _set_sigterm(_raise_terminated)
    try:
        return handlers[args.command](args)
    except Exception as exc:  # noqa: BLE001 - the command's last line of defence: one line, no traceback
        if args.debug:
            raise
        status, line = _failure(exc)
    except KeyboardInterrupt as exc:  # Ctrl-C, or SIGTERM (Terminated)
        status, line = _failure(exc)
    finally:
        if before is not None:
            _set_sigterm(before)
    print(one_line(line), file=sys.stderr)
    return status



#: Commands whose process ends at once when they return (:func:`command`)
PROMPT_EXIT_COMMANDS = frozenset({"run", "hazard"})

#: The subcommand :func:`main` ran last in this process
_ran = {"command": None}


def command():
    """The ``quakefolio`` program: :func:`main`, then, after a run, the process ends at once with its status.

    When a run's :func:`main` returns, everything it wrote is closed (tables, reports and
    manifests are written by atomic renames; Prefect's queued logs and events were sent when
    the flow run ended; the run's log file is written record by record, unbuffered); what the
    interpreter would still do is take apart the modules and objects the run left, which
    nobody sees and takes about 1 s after a flow run of 10^6 buildings.  So for the commands
    of :data:`PROMPT_EXIT_COMMANDS` standard output and standard error are flushed and the
    process exits with :func:`os._exit`; where a flush fails (a closed pipe) the ordinary exit
    reports it.  Other commands (a schedule served until Ctrl-C, a report) exit as usual.
    Tests call :func:`main`.
    """
    import os

    status = main()
    if _ran["command"] not in PROMPT_EXIT_COMMANDS:
        sys.exit(status)
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except Exception:  # noqa: BLE001 - the ordinary exit deals with it (and says so)
        sys.exit(status)
    os._exit(status)


if __name__ == "__main__":
    sys.exit(command())
