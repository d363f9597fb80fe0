"""The log file of a run: where Prefect's own log records go instead of the terminal.

On the command line the terminal shows the run's progress, its summary, and on failure
one ``error:`` line; Prefect's records (task and flow states, retries, tracebacks of a
failed task, messages of the embedded server) are written to a log file:

* ``<output folder>/logs/<UTC time>-<pid>.log`` when the output folder already holds runs
  of ours (a ``runs`` folder or a ``LATEST`` file) and can be written;
* else ``<state folder>/logs/<UTC time>-<pid>.log`` (first run, or an output folder that
  cannot be written).

The file (and its folder) is created with the first record, so a command that stops
before Prefect logs anything leaves no file behind.

:func:`settings_file` writes a Prefect logging configuration whose handlers are
:class:`RunLogHandler` (Prefect reads it through ``PREFECT_LOGGING_SETTINGS_PATH``, set by
:func:`quakefolio.pipeline.env.configure_prefect`); the handler finds the file in
``QUAKEFOLIO_LOG_FILE``, which processes started by this one (the embedded Prefect
server, Dask workers) inherit, so they log to the same file.  Writing the log never
raises: a full or read-only disk loses log records, not the run's error line.
"""
from __future__ import annotations

import json
import logging
import os
import sys
import time
from pathlib import Path

from quakefolio.pipeline.io.atomic import atomic_write_text

__all__ = ["LOG_ENV", "choose_log_file", "current_log", "settings_file", "RunLogHandler"]

#: Environment variable naming the log file of this run (inherited by child processes).
LOG_ENV = "QUAKEFOLIO_LOG_FILE"

_FORMAT = "%(asctime)s.%(msecs)03d | %(levelname)-7s | %(name)s - %(message)s"


def _stamp():
    return time.strftime("%Y%m%dT%H%M%SZ", time.gmtime()) + f"-{os.getpid()}"


def _writable(folder):
    """True if ``folder`` (or, when it does not exist yet, its parent) can be written."""
    folder = Path(folder)
    target = folder if folder.exists() else folder.parent
    return target.is_dir() and os.access(target, os.W_OK)


def choose_log_file(output_folder, state_folder):
    """The log file of a run about to start (see the module's notes); not created here.

    Parameters
    ----------
    output_folder : path-like
        The run's ``[output] folder``.
    state_folder : path-like
        The project state folder (:func:`quakefolio.pipeline.env.state_folder`).

    Returns
    -------
    pathlib.Path
        ``<output folder>/logs/<name>`` or ``<state folder>/logs/<name>``.
    """
    name = f"{_stamp()}.log"
    output = Path(output_folder)
    ours = (output / "runs").is_dir() or (output / "LATEST").is_file()
    if ours and _writable(output) and _writable(output / "logs"):
        return output / "logs" / name
    return Path(state_folder) / "logs" / name


def current_log():
    """The log file this process writes Prefect's records to, if it holds any.

    Returns
    -------
    pathlib.Path or None
        None when no log file is set or it is still empty.
    """
    path = os.environ.get(LOG_ENV)
    try:
        return Path(path) if path and os.path.getsize(path) > 0 else None
    except OSError:
        return None


class RunLogHandler(logging.Handler):
    """Appends formatted records to the file named by ``QUAKEFOLIO_LOG_FILE``; never raises.

    Each record is one ``write`` on a file opened for appending, so several processes can
    share the file.  Without ``QUAKEFOLIO_LOG_FILE`` records of level WARNING and above go
    to stderr (as Prefect's console would show them).  Keyword arguments of Prefect's
    console handler (``stream``, ``styles`` ...) are accepted and ignored.
    """

    def __init__(self, level=logging.NOTSET, **_ignored):
        super().__init__(level)
        self.path = os.environ.get(LOG_ENV) or None
        self._fd = None
        self._broken = False

    def emit(self, record):
        """Write ``record`` to the log file (or stderr, see the class notes); errors are dropped.

        Parameters
        ----------
        record : logging.LogRecord
        """
        try:
            text = self.format(record) + "\n"
            if self.path is None:
                if record.levelno >= logging.WARNING:
                    sys.stderr.write(text)
                return
            if self._broken:
                return
            if self._fd is None:
                os.makedirs(os.path.dirname(self.path), exist_ok=True)
                self._fd = os.open(self.path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
            os.write(self._fd, text.encode("utf-8", errors="replace"))
        except Exception:  # noqa: BLE001 - a log that cannot be written must not fail the run
            self._broken = self._fd is None

    def handleError(self, record):  # noqa: N802 - logging's name
        """Drop the record silently (the terminal is kept for the run's own one-line error).

        Parameters
        ----------
        record : logging.LogRecord
        """

    def close(self):
        """Close the file."""
        if self._fd is not None:
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None
        super().close()


def _config():
    """Prefect's logging configuration with every terminal handler replaced by :class:`RunLogHandler`.

    Loggers and levels follow Prefect's own default configuration (``${...}`` are Prefect
    settings, filled in by Prefect when it reads the file); run and task records still
    also go to the Prefect API.
    """
    handler = f"{__name__}.RunLogHandler"
    to_file = {"handlers": ["file"], "propagate": False}
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {
            "standard": {
                "()": "prefect.logging.formatters.PrefectFormatter",
                "format": _FORMAT,
                "flow_run_fmt": "%(asctime)s.%(msecs)03d | %(levelname)-7s | Flow run %(flow_run_name)r - %(message)s",
                "task_run_fmt": "%(asctime)s.%(msecs)03d | %(levelname)-7s | Task run %(task_run_name)r - %(message)s",
                "datefmt": "%Y-%m-%d %H:%M:%S",
            },
        },
        "handlers": {
            "file": {"level": "INFO", "class": handler, "formatter": "standard"},
            "api": {"level": 0, "class": "prefect.logging.handlers.APILogHandler"},
            "worker_api": {"level": 0, "class": "prefect.logging.handlers.WorkerAPILogHandler"},
        },
        "loggers": {
            "prefect": {"level": "${PREFECT_LOGGING_LEVEL}"},
            "prefect.extra": {"level": "${PREFECT_LOGGING_LEVEL}", "handlers": ["api"], "propagate": False},
            "prefect.flow_runs": {"level": "NOTSET", "handlers": ["api"]},
            "prefect.task_runs": {"level": "NOTSET", "handlers": ["api"]},
            "prefect.workers": {"level": "NOTSET", "handlers": ["worker_api"]},
            "prefect.server": {"level": "${PREFECT_SERVER_LOGGING_LEVEL}"},
            "prefect.client": {"level": "${PREFECT_LOGGING_LEVEL}"},
            "prefect.infrastructure": {"level": "${PREFECT_LOGGING_LEVEL}"},
            "prefect._internal": {"level": "${PREFECT_INTERNAL_LOGGING_LEVEL}", **to_file},
            "uvicorn": {"level": "${PREFECT_SERVER_LOGGING_LEVEL}", **to_file},
            "fastapi": {"level": "${PREFECT_SERVER_LOGGING_LEVEL}", **to_file},
            "py.warnings": {"level": "WARNING", **to_file},
        },
        "root": {"level": "WARNING", "handlers": ["file"]},
    }


def settings_file(folder):
    """Write the logging configuration (JSON, which Prefect reads as YAML) into ``folder``.

    The file is rewritten only when its content differs, by a rename (processes that read
    it meanwhile see the old or the new file).

    Parameters
    ----------
    folder : path-like
        Prefect's home folder; created if missing.

    Returns
    -------
    pathlib.Path
        ``<folder>/logging.json``.
    """
    folder = Path(folder)
    path = folder / "logging.json"
    text = json.dumps(_config(), indent=2) + "\n"
    try:
        if path.read_text(encoding="utf-8") == text:
            return path
    except OSError:
        pass
    folder.mkdir(parents=True, exist_ok=True)
    atomic_write_text(path, text)
    return path
