"""Prefect environment for embedded runs; must run before ``import prefect``.

Prefect reads its settings when it is imported, so these variables are set first:
state in a project-local folder, telemetry off, a quiet console (warnings and above;
logs are still stored), a generous start-up timeout for the embedded server, and a
quiet embedded server.  Values already set by the user are kept.

For a run of the command line, Prefect's log records go to the run's log file instead of
the terminal (:mod:`quakefolio.pipeline.runlog`): the terminal keeps the progress, the
summary and one ``error:`` line.
"""
from __future__ import annotations

import os
import sys
import threading
from pathlib import Path

__all__ = ["configure_prefect", "state_folder", "import_prefect_meanwhile", "PREFECT_MODULES"]


def state_folder():
    """Absolute folder for Prefect state: ``$QUAKEFOLIO_STATE`` or ``./.quakefolio``.

    Returns
    -------
    pathlib.Path
        Resolved against the current folder; not created here.
    """
    return Path(os.environ.get("QUAKEFOLIO_STATE", ".quakefolio")).resolve()


def configure_prefect(log_to=None):
    """Set Prefect's environment for embedded runs (values already set are kept).

    Sets ``PREFECT_HOME`` to ``<state folder>/prefect`` (created), telemetry off (server
    and client, ``DO_NOT_TRACK``), the console log level to WARNING, the embedded server's
    start-up timeout to 90 s and its log level to ERROR.  Has no effect once ``prefect`` is imported (Prefect reads its
    settings at import), so the CLI calls it first.

    With ``log_to``, Prefect's log records of this process and of the processes it starts
    (embedded server, Dask workers) go to a new log file instead of the terminal
    (:func:`quakefolio.pipeline.runlog.choose_log_file`), and so do Python warnings; a
    logging configuration the user set (``PREFECT_LOGGING_CONFIG_PATH``) is kept.

    Parameters
    ----------
    log_to : path-like, optional
        The run's output folder (its ``logs`` folder holds the log file when the folder
        already holds runs; otherwise ``<state folder>/logs``).

    Returns
    -------
    pathlib.Path
        Prefect's home folder ``<state folder>/prefect``.
    """
    if "prefect" in sys.modules:  # too late to take effect; the caller imported prefect first
        return state_folder() / "prefect"
    home = state_folder() / "prefect"
    home.mkdir(parents=True, exist_ok=True)
    defaults = {
        "PREFECT_HOME": str(home),
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "DO_NOT_TRACK": "1",  # the client's usage data too (and its first-run notice on the terminal)
        "PREFECT_LOGGING_HANDLERS_CONSOLE_LEVEL": "WARNING",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
        "PREFECT_SERVER_LOGGING_LEVEL": "ERROR",
    }
    for key, value in defaults.items():
        os.environ.setdefault(key, value)
    if log_to is not None and not _user_logging_config():
        _log_to_file(log_to, home)
    return home


#: Prefect's modules that a flow run of this process needs (about 1.5 s of import, most of it
#: building pydantic models; none of them imports numpy, pandas or pyarrow)
PREFECT_MODULES = ("prefect", "prefect.flows", "prefect.tasks", "prefect.cache_policies", "prefect.settings",
                   "prefect.task_runners", "prefect.flow_engine", "prefect.task_engine", "fastapi.encoders")


def import_prefect_meanwhile(log_to=None):
    """Import :data:`PREFECT_MODULES` in a background thread, after :func:`configure_prefect`.

    For a flow run whose inputs take a while to read: the import (Python code, holding the
    interpreter lock) overlaps the reading (mostly Arrow's CSV parser and numpy, which
    release it).  The thread imports Prefect's own modules only, not the stages', so it and
    the reading share no module being imported but the standard library's.  An import error
    is left for the flow path to meet again in the main thread.

    Parameters
    ----------
    log_to : path-like, optional
        As for :func:`configure_prefect`.

    Returns
    -------
    threading.Thread
        Started (a daemon); join it before the command ends.
    """
    configure_prefect(log_to)
    thread = threading.Thread(target=_import_modules, name="quakefolio-prefect-import", daemon=True)
    thread.start()
    return thread


def _import_modules():
    import importlib

    for name in PREFECT_MODULES:
        try:
            importlib.import_module(name)
        except Exception:  # noqa: BLE001 - met again, and reported, where the flow path imports Prefect
            return


def _user_logging_config():
    return any(os.environ.get(k) for k in ("PREFECT_LOGGING_CONFIG_PATH", "PREFECT_LOGGING_SETTINGS_PATH"))


def _log_to_file(output_folder, home):
    import logging

    from quakefolio.pipeline import runlog

    path = runlog.choose_log_file(output_folder, state_folder())
    try:
        settings = runlog.settings_file(home)
    except OSError:
        return
    os.environ[runlog.LOG_ENV] = str(path)
    os.environ["PREFECT_LOGGING_CONFIG_PATH"] = str(settings)
    logging.captureWarnings(True)  # Python warnings become log records (to the same file)
