"""Scheduled reruns: a deployment of the portfolio-risk flow, served on a cron schedule.

``quakefolio schedule CONFIG --cron "..."`` creates (or updates) a deployment of
:func:`scheduled_portfolio_risk` on a local Prefect server (schedules do not run on the
embedded server; see :mod:`quakefolio.pipeline.server`) and serves it: a runner in the
``quakefolio`` process polls the server and executes each due run in a subprocess.

A scheduled run first compares a digest of every input file and the resolved config
(:func:`quakefolio.pipeline.runner.inputs_digest`) with the manifest of the run
``LATEST`` points to.  If they are equal it writes nothing (no run, no cache entry, no
report) and says ``inputs unchanged since run <id>; nothing written``.  Otherwise it
runs ``portfolio-risk`` as a subflow and writes the change report against the previous
run (:func:`quakefolio.pipeline.compare.write_change_report`); the new run's report shows the
trend of the headline figures across the output folder's runs
(:mod:`quakefolio.pipeline.report.sections_trend`).

:func:`serve_schedule` with ``run_once=True`` creates the deployment, triggers one run
now and executes it, without waiting for the clock (used by tests and for a manual
catch-up).  Import this module only after
:func:`quakefolio.pipeline.env.configure_prefect`.
"""
from __future__ import annotations

import asyncio
import hashlib
import json
import re
import sys
from pathlib import Path

from prefect import flow, get_run_logger
from prefect.task_runners import ThreadPoolTaskRunner

from quakefolio.pipeline.stages.inputs import load_inputs
from quakefolio.pipeline.io.config import resolve_execution
from quakefolio.pipeline.flow import portfolio_risk
from quakefolio.pipeline.orchestration import dask_task_runner, using_api
from quakefolio.pipeline.runner import inputs_digest
from quakefolio.pipeline.io.store import latest_run

__all__ = ["scheduled_portfolio_risk", "serve_schedule", "unchanged_since", "deployment_name", "check_cron",
           "FLOW_NAME"]

FLOW_NAME = "portfolio-risk-scheduled"


def unchanged_since(inputs):
    """The run ``LATEST`` points to if it is a full run of exactly these inputs, else None.

    "Exactly these inputs": the manifest's ``inputs_sha256`` equals
    :func:`inputs_digest` of ``inputs`` (every input file's sha256 and the resolved
    config) and the run holds every stage (not a ``quakefolio hazard`` run).

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        The validated inputs of the scheduled run.

    Returns
    -------
    pathlib.Path or None
        The unchanged run's folder; None also when there is no run or its manifest is
        unreadable.
    """
    previous = latest_run(inputs.config.output.folder)
    if previous is None:
        return None
    try:
        manifest = json.loads((previous / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if manifest.get("inputs_sha256") == inputs_digest(inputs) and manifest.get("stages") == "all":
        return previous
    return None


def _say(message):
    get_run_logger().info(message)  # stored with the flow run on the server
    print(message, flush=True)  # and on the terminal of the serving process


@flow(name=FLOW_NAME, persist_result=False, log_prints=False)
def scheduled_portfolio_risk(config_path: str) -> str:
    """Rerun ``portfolio-risk`` for ``config_path`` if any input changed since the last run.

    Runs with the config's executor (threads, or Dask) and writes the change report
    against the previous run when there is one.

    Parameters
    ----------
    config_path : str
        Absolute path of the run config.

    Returns
    -------
    str
        The new run folder, or ``""`` when nothing was written.
    """
    inputs = load_inputs(config_path)  # a bad input fails this run and writes nothing
    same = unchanged_since(inputs)
    if same is not None:
        _say(f"inputs unchanged since run {same.name}; nothing written")
        return ""
    previous = latest_run(inputs.config.output.folder)
    backend, address = resolve_execution(inputs.config)
    if backend == "dask":
        runner = dask_task_runner(address)
    else:
        runner = ThreadPoolTaskRunner(max_workers=inputs.config.execution.max_workers)
    run_dir = Path(portfolio_risk.with_options(task_runner=runner)(config_path, "all"))
    if previous is None:
        _say(f"new run {run_dir.name} (no earlier run to compare with)")
    else:
        from quakefolio.pipeline.compare import write_change_report

        report = write_change_report(previous, run_dir)
        _say(f"new run {run_dir.name}; change report against run {previous.name}: {report}")
    return str(run_dir)


def deployment_name(config_path):
    """Deployment name of a config: its folder name and 8 hex of its absolute path.

    Parameters
    ----------
    config_path : str or Path
        Run config file.

    Returns
    -------
    str
        ``<folder name>-<8 hex of the sha256 of the absolute path>``; characters other than
        letters, digits, ``_``, ``.`` and ``-`` become ``-``.
    """
    path = str(Path(config_path).resolve())
    stem = re.sub(r"[^A-Za-z0-9_.-]+", "-", Path(path).parent.name).strip("-") or "config"
    return f"{stem}-{hashlib.sha256(path.encode()).hexdigest()[:8]}"


def check_cron(cron, timezone="UTC"):
    """The problem with a cron string or time zone, or None (Prefect's own validation).

    Parameters
    ----------
    cron : str
        Cron string, e.g. ``"0 3 * * 1"``.
    timezone : str
        IANA time zone name.

    Returns
    -------
    str or None
        Prefect's validation messages joined by ``; ``, or None when both are valid.
    """
    from prefect.client.schemas.schedules import CronSchedule

    try:
        CronSchedule(cron=cron, timezone=timezone)
    except ValueError as exc:
        errors = getattr(exc, "errors", None)
        if callable(errors):
            return "; ".join(str(e.get("msg", e)) for e in errors())
        return str(exc)
    return None


def serve_schedule(config_path, cron, *, api_url, timezone="UTC", run_once=False):
    """Create (or update) the deployment of ``config_path`` with a cron schedule and serve it.

    Parameters
    ----------
    config_path : path
        Run config; the deployment passes its absolute path to every run.
    cron : str
        Five-field cron string, e.g. ``"0 3 * * 1"`` (Mondays 03:00).
    api_url : str
        Prefect API of a running server (not the embedded one).
    timezone : str
        IANA time zone of the cron fields.
    run_once : bool
        False: serve until interrupted (the schedule is paused on shutdown).  True:
        create a run now, execute it, return without pausing the schedule.

    Returns
    -------
    dict
        ``deployment`` (``flow/name``), ``deployment_id`` and, with ``run_once``, the
        ``flow_run_id`` and final ``state`` of the run.
    """
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.schedules import CronSchedule
    from prefect.deployments.runner import EntrypointType
    from prefect.runner import Runner

    path = str(Path(config_path).resolve())
    name = deployment_name(path)
    with using_api(api_url):
        runner = Runner(name=name, pause_on_shutdown=not run_once, limit=1)
        deployment_id = runner.add_flow(
            scheduled_portfolio_risk, name=name, schedule=CronSchedule(cron=cron, timezone=timezone),
            parameters={"config_path": path}, entrypoint_type=EntrypointType.MODULE_PATH,
            description=f"quakefolio scheduled rerun of {path}", tags=["quakefolio"])
        out = {"deployment": f"{FLOW_NAME}/{name}", "deployment_id": str(deployment_id)}
        if not run_once:
            print(f"serving {out['deployment']} on cron {cron!r} ({timezone}) at {api_url}; Ctrl-C stops",
                  file=sys.stderr, flush=True)
            try:
                asyncio.run(runner.start())
            except KeyboardInterrupt:
                pass
            return out
        with get_client(sync_client=True) as client:
            flow_run = client.create_flow_run_from_deployment(deployment_id)
        asyncio.run(runner.start(run_once=True))
        with get_client(sync_client=True) as client:
            state = client.read_flow_run(flow_run.id).state
        out.update(flow_run_id=str(flow_run.id), state=state.name if state is not None else "unknown")
        return out
