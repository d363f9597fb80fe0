"""Scale-out: the ``portfolio-risk`` flow with its block tasks on a Dask cluster.

The flow is the same as for a local run; only its task runner differs
(``prefect_dask.DaskTaskRunner``).  Stages that run once (ingest, combining blocks,
writing the run) stay in the driver process; block tasks (hazard site blocks,
disaggregation site blocks, (site, class) blocks, event chunks) run on the workers with
a small run reference and their block (see :mod:`quakefolio.pipeline.stages.blocks`).

Every task reports to one Prefect API: :func:`run_on_dask` connects to (or starts) a
local server on 127.0.0.1 (:mod:`quakefolio.pipeline.server`) and runs the flow with
Prefect's settings pointing at it.  The settings travel with each submitted task, so the
workers use that server instead of starting an embedded one each.

Before anything starts, a given scheduler address is probed (:func:`check_scheduler`, a
few seconds at most): an address where nothing listens, or where something other than a
Dask scheduler answers, is a user error of one line, not a run that waits or fails later.

Import this module only after :func:`quakefolio.pipeline.env.configure_prefect`.
"""
from __future__ import annotations

import asyncio
import os
import socket
from contextlib import contextmanager, nullcontext
from pathlib import Path

from quakefolio.core.errors import InputError
from quakefolio.pipeline.io.config import resolve_execution  # noqa: F401 - part of this module's API

__all__ = ["LOCAL_CLUSTER", "PROBE_TIMEOUT_S", "resolve_execution", "check_scheduler", "dask_task_runner",
           "run_on_dask", "using_api", "flush_to_api"]

#: Longest wait for a given scheduler address to accept a connection, and then to answer [s].
PROBE_TIMEOUT_S = 5.0

#: The cluster started when no address is given: ``distributed.LocalCluster`` on loopback,
#: 2 worker processes with one thread each, dashboard on a free loopback port.
LOCAL_CLUSTER = {"n_workers": 2, "threads_per_worker": 1, "processes": True, "host": "127.0.0.1",
                 "dashboard_address": "127.0.0.1:0"}


def _where(address):
    return f"Dask scheduler {address}"


def _reach(host, port, address, timeout_s):
    """Open and close a TCP connection to ``host:port``; InputError naming the cause if that fails."""
    try:
        socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except (socket.gaierror, UnicodeError) as exc:
        raise InputError(_where(address), f"host {host!r} does not resolve ({exc.args[-1]}); "
                                          "check --address or [execution] address") from None
    try:
        with socket.create_connection((host, port), timeout=timeout_s):
            pass
    except ConnectionRefusedError:
        raise InputError(_where(address), "connection refused: nothing listens at that address "
                                          "(is the scheduler running? check --address or [execution] address)") from None
    except TimeoutError:
        raise InputError(_where(address), f"no answer within {timeout_s:g} s (a firewall, or a host that is "
                                          "down?); check --address or [execution] address") from None
    except OSError as exc:
        raise InputError(_where(address), f"cannot connect: {exc.strerror or exc}") from None


async def _identity(address, timeout_s):
    from distributed.comm import connect

    comm = await asyncio.wait_for(connect(address, timeout=timeout_s), timeout_s)
    try:
        await asyncio.wait_for(comm.write({"op": "identity", "reply": True}), timeout_s)
        return await asyncio.wait_for(comm.read(), timeout_s)
    finally:
        comm.abort()


def check_scheduler(address, timeout_s=PROBE_TIMEOUT_S):
    """Check that a Dask scheduler answers at ``address``, within a few seconds.

    A TCP connection is opened first (a host that does not resolve, a refused connection
    or no answer are told apart); for ``tcp://`` addresses the scheduler is then asked who
    it is, Dask's own ``identity`` request, and must answer as a ``Scheduler``.  Other
    schemes (``tls``, ``ucx``, ``inproc``) need their security or transport set-up and are
    only checked for a connection, where they have a host and port.

    Parameters
    ----------
    address : str
        Scheduler address, e.g. ``tcp://10.0.0.5:8786``.
    timeout_s : float
        Longest wait for the connection, and then for each step of the answer [s].

    Raises
    ------
    quakefolio.core.errors.InputError
        One line naming the address and the cause.
    """
    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, loc = parse_address(address)
        host, port = parse_host_port(loc, default_port=8786) if scheme in ("tcp", "tls") else (None, None)
    except ValueError as exc:
        raise InputError(_where(address), f"not a scheduler address: {exc}") from None
    if host is None:
        return
    _reach(host, port, address, timeout_s)
    if scheme != "tcp":
        return
    try:
        who = asyncio.run(_identity(address, timeout_s))
    except Exception:  # noqa: BLE001 - whatever the peer said, it is not a Dask scheduler's answer
        who = None
    kind = who.get("type") if isinstance(who, dict) else None
    if kind != "Scheduler":
        what = f"a Dask {kind}" if isinstance(kind, str) and kind else "a server that is not Dask"
        raise InputError(_where(address), f"{what} answers there, not a Dask scheduler (give the scheduler's "
                                          "address, usually port 8786, with --address or [execution] address)")


def dask_task_runner(address=""):
    """A ``DaskTaskRunner`` on the cluster at ``address``, or on a new :data:`LOCAL_CLUSTER`.

    Parameters
    ----------
    address : str
        Scheduler address (``tcp://host:port``); empty for a local cluster started with
        the flow run.

    Returns
    -------
    prefect_dask.DaskTaskRunner
    """
    from prefect_dask import DaskTaskRunner

    if address:
        return DaskTaskRunner(address=address)
    return DaskTaskRunner(cluster_class="distributed.LocalCluster", cluster_kwargs=dict(LOCAL_CLUSTER))


@contextmanager
def using_api(url):
    """Point Prefect at the API ``url`` within the block.

    Prefect's settings of this process (they travel with every task submitted to Dask)
    and ``PREFECT_API_URL`` in the environment (inherited by flow-run subprocesses) are
    both set, and restored afterwards; queued logs and events are flushed to the API
    before leaving (:func:`flush_to_api`).  The environment is set first: when this first
    imports Prefect, its settings already name ``url`` and are not copied (a copy
    validates every Prefect setting again, about 0.1 s of CPU per run).

    Parameters
    ----------
    url : str
        Prefect API URL, e.g. ``http://127.0.0.1:4200/api``.

    Yields
    ------
    None
    """
    before = os.environ.get("PREFECT_API_URL")
    os.environ["PREFECT_API_URL"] = url
    try:
        from prefect.settings import PREFECT_API_URL, get_current_settings, temporary_settings

        same = get_current_settings().api.url == url
        with nullcontext() if same else temporary_settings(updates={PREFECT_API_URL: url}):
            try:
                yield
            finally:
                flush_to_api()
    finally:
        if before is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = before


def flush_to_api(timeout_s=10.0):
    """Send the logs and events still queued in this process to the API, waiting at most ``timeout_s`` each.

    Call it before the server goes away; otherwise the background senders keep retrying
    a closed port when the process exits.

    Parameters
    ----------
    timeout_s : float
        Longest wait per sender (logs, events) [s].
    """
    from prefect.events.worker import EventsWorker
    from prefect.logging.handlers import APILogWorker

    for worker in (APILogWorker, EventsWorker):
        try:
            worker.drain_all(timeout=timeout_s)
        except Exception:  # noqa: BLE001 - best effort: nothing queued, or the sender already stopped
            pass


def run_on_dask(config_path, address="", *, stages_to_run="all", api_url=None, inputs=None):
    """Run ``portfolio-risk`` with its block tasks on Dask; returns the run folder.

    ``address`` is the scheduler of an existing cluster (``tcp://host:port``); empty
    starts :data:`LOCAL_CLUSTER` for this run.  ``api_url`` is the Prefect API every
    task reports to; None uses the shared local server of the state folder
    (found running, or started and left running: :func:`quakefolio.pipeline.server.use_server`),
    or ``PREFECT_API_URL`` if set.

    Parameters
    ----------
    config_path : str or Path
        Run config file.
    address : str
        Dask scheduler address; empty for a local cluster.
    stages_to_run : {"all", "hazard"}
        Every stage, or the hazard stage only.
    api_url : str, optional
        Prefect API URL of a running server.
    inputs : quakefolio.pipeline.stages.inputs.RunInputs, optional
        The inputs of ``config_path`` already read in this process (read once per run).

    Returns
    -------
    pathlib.Path
        The run folder.

    Raises
    ------
    quakefolio.core.errors.InputError
        When ``address`` is given and no Dask scheduler answers there (:func:`check_scheduler`).
    """
    if address:
        check_scheduler(address)  # before Prefect is even imported: a wrong address is one line, at once
    from quakefolio.pipeline.flow import hand_over, portfolio_risk

    config = str(Path(config_path).resolve())
    with _api(api_url) as url, using_api(url):
        flow = portfolio_risk.with_options(task_runner=dask_task_runner(address))
        hand_over(config, inputs)
        try:
            return Path(flow(config, stages_to_run))
        finally:
            hand_over(config, None, forget=True)


@contextmanager
def _api(url):
    """``url`` as given, else the shared local server's (found running or started; left running)."""
    if url is not None:
        yield url
        return
    from quakefolio.pipeline.server import use_server

    with use_server() as server:
        yield server.url
