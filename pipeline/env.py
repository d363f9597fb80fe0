"""Prefect environment for embedded runs; must run before ``import prefect``.

Prefect reads its settings when it is imported, so these variables are set first:
state in a project-local folder, telemetry off, a quiet console (warnings and above;
logs are still stored), a generous start-up timeout for the embedded server, and a
quiet embedded server.  Values already set by the user are kept.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

__all__ = ["configure_prefect", "state_folder"]


def state_folder():
    """Absolute folder for Prefect state: ``$QUAKEFOLIO_STATE`` or ``./.quakefolio``.

    Returns
    -------
    pathlib.Path
        Resolved against the current folder; not created here.
    """
    return Path(os.environ.get("QUAKEFOLIO_STATE", ".quakefolio")).resolve()


def configure_prefect():
    """Set Prefect's environment for embedded runs (values already set are kept).

    Sets ``PREFECT_HOME`` to ``<state folder>/prefect`` (created), telemetry off, the
    console log level to WARNING, the embedded server's start-up timeout to 90 s and its
    log level to ERROR.  Has no effect once ``prefect`` is imported (Prefect reads its
    settings at import), so the CLI calls it first.

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
        "PREFECT_LOGGING_HANDLERS_CONSOLE_LEVEL": "WARNING",
        "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "90",
        "PREFECT_SERVER_LOGGING_LEVEL": "ERROR",
    }
    for key, value in defaults.items():
        os.environ.setdefault(key, value)
    return home
