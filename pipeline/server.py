"""A local Prefect server on loopback, with its database in the project state folder.

The embedded server that ``quakefolio run`` uses lives and dies with one process.
Schedules need a server that outlives it (its scheduler service creates the flow runs),
and Dask workers need one API they all report to (otherwise every worker process starts
an embedded server of its own).  This module starts such a server, or finds one that is
already running, without importing Prefect itself:

* it listens on 127.0.0.1 only (:data:`LOOPBACK`), on a free port;
* its SQLite database is ``<state folder>/server/prefect.db`` and its log
  ``<state folder>/server/server.log``;
* ``<state folder>/server/server.json`` records its URL and process id, so that a later
  ``quakefolio`` process connects to it instead of starting another;
* :meth:`LocalServer.stop` stops it only if this process started it.

If ``PREFECT_API_URL`` is set in the environment, that server is used as it is and none
is started.
"""
from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import urlsplit

from quakefolio.pipeline.env import state_folder
from quakefolio.pipeline.io.store import atomic_write_text, process_alive

__all__ = ["LOOPBACK", "LocalServer", "ServerError", "server_folder", "find_server", "start_server",
           "ensure_server", "connect_or_start", "is_healthy"]

#: The only address a server started by quakefolio listens on.
LOOPBACK = "127.0.0.1"

#: Seconds to wait for a new server to answer (it needs about 10-15 s on 2 cores).
START_TIMEOUT_S = 90.0


class ServerError(RuntimeError):
    """A Prefect server could not be started or does not answer."""


def server_folder():
    """``<state folder>/server``: database, log and the record of the running server.

    Returns
    -------
    pathlib.Path
        Not created here.
    """
    return state_folder() / "server"


@dataclass
class LocalServer:
    """A Prefect API this process talks to.

    ``owned`` is true when this process started the server; only then does
    :meth:`stop` end it.
    """

    url: str  # ".../api"
    host: str
    port: int
    pid: int | None = None
    owned: bool = False
    database: Path | None = None
    log: Path | None = None
    _process: subprocess.Popen | None = field(default=None, repr=False, compare=False)

    def stop(self, timeout_s=20.0):
        """End the server if this process started it (its whole process group); else do nothing.

        SIGTERM to the process group, SIGKILL if it has not exited within ``timeout_s``; the
        state folder's record is removed if it names this server.

        Parameters
        ----------
        timeout_s : float
            Wait for a clean exit before killing [s].
        """
        if not self.owned or self.pid is None:
            return
        try:
            os.killpg(self.pid, signal.SIGTERM)  # started with start_new_session: the group id is its pid
        except ProcessLookupError:
            pass
        if not _wait_exit(self, timeout_s):
            try:
                os.killpg(self.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
            _wait_exit(self, 5.0)
        record = server_folder() / "server.json"
        try:
            if json.loads(record.read_text(encoding="utf-8")).get("pid") == self.pid:
                record.unlink()
        except (OSError, ValueError):
            pass
        self.owned = False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.stop()


def _wait_exit(server, timeout_s):
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if server._process is not None:
            if server._process.poll() is not None:
                return True
        elif not process_alive(server.pid):
            return True
        time.sleep(0.1)
    return False


def is_healthy(url, timeout_s=2.0):
    """True if the Prefect API at ``url`` answers its health check (no proxy is used).

    Parameters
    ----------
    url : str
        Prefect API URL (``.../api``); ``/health`` is appended.
    timeout_s : float
        Request timeout [s].

    Returns
    -------
    bool
    """
    opener = urllib.request.build_opener(urllib.request.ProxyHandler({}))
    try:
        with opener.open(url.rstrip("/") + "/health", timeout=timeout_s) as resp:
            return resp.status == 200
    except (urllib.error.URLError, OSError, ValueError):
        return False


def find_server():
    """The server recorded in the state folder if it is still running and answers, else None.

    Returns
    -------
    LocalServer or None
        Not owned by this process (:meth:`LocalServer.stop` leaves it running).
    """
    record = server_folder() / "server.json"
    try:
        info = json.loads(record.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    pid = info.get("pid")
    if not isinstance(pid, int) or not process_alive(pid) or not is_healthy(info.get("url", "")):
        return None
    return LocalServer(url=info["url"], host=info["host"], port=info["port"], pid=pid, owned=False,
                       database=Path(info["database"]), log=Path(info["log"]))


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def _server_env(database):
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)  # the server is the API; it must not point at another one
    env.setdefault("PREFECT_HOME", str(state_folder() / "prefect"))
    env.update({
        "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
        "PREFECT_SERVER_API_HOST": LOOPBACK,
        "PREFECT_SERVER_DATABASE_CONNECTION_URL": f"sqlite+aiosqlite:///{database}",
        "PREFECT_UI_ENABLED": "false",
    })
    env.setdefault("PREFECT_SERVER_LOGGING_LEVEL", "WARNING")
    return env


@contextmanager
def _start_lock(folder):
    """An exclusive lock so that two quakefolio processes do not both start a server."""
    import fcntl

    with open(folder / "start.lock", "w") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def start_server(timeout_s=START_TIMEOUT_S):
    """Start a Prefect server on 127.0.0.1 with its database in the state folder.

    The server runs as ``python -m prefect server start`` in a new session on a free
    loopback port, UI off, logging to ``server.log``; once healthy it is recorded in
    ``server.json`` (written atomically).

    Parameters
    ----------
    timeout_s : float
        Longest wait for the health check to answer [s].

    Returns
    -------
    LocalServer
        Owned by this process.

    Raises
    ------
    ServerError
        Naming the server log and its last line, if it exits or does not answer within
        ``timeout_s``.
    """
    folder = server_folder()
    folder.mkdir(parents=True, exist_ok=True)
    database = folder / "prefect.db"
    log_path = folder / "server.log"
    port = _free_port()
    url = f"http://{LOOPBACK}:{port}/api"
    cmd = [sys.executable, "-m", "prefect", "server", "start", "--host", LOOPBACK, "--port", str(port),
           "--no-ui"]
    with open(log_path, "ab") as log:
        proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                                env=_server_env(database), cwd=folder, start_new_session=True)
    server = LocalServer(url=url, host=LOOPBACK, port=port, pid=proc.pid, owned=True, database=database,
                         log=log_path, _process=proc)
    deadline = time.monotonic() + timeout_s
    while True:
        if proc.poll() is not None:
            raise ServerError(f"the Prefect server exited with status {proc.returncode}; "
                              f"its log {log_path} ends: {_tail(log_path)}")
        if is_healthy(url):
            break
        if time.monotonic() > deadline:
            server.stop()
            raise ServerError(f"the Prefect server did not answer at {url} within {timeout_s:g} s; "
                              f"its log {log_path} ends: {_tail(log_path)}")
        time.sleep(0.25)
    info = {"url": url, "host": LOOPBACK, "port": port, "pid": proc.pid, "database": str(database),
            "log": str(log_path)}
    atomic_write_text(folder / "server.json", json.dumps(info, indent=2) + "\n")
    return server


def _tail(path):
    """The last non-empty line of ``path`` (the error line is printed as one line)."""
    try:
        lines = [ln for ln in Path(path).read_text(encoding="utf-8", errors="replace").splitlines() if ln.strip()]
    except OSError:
        return "(no log)"
    return lines[-1].strip() if lines else "(empty)"


def ensure_server(timeout_s=START_TIMEOUT_S):
    """The running server of this state folder, or a new one (then owned by the caller).

    A file lock in the server folder keeps two processes from starting a server each.

    Parameters
    ----------
    timeout_s : float
        Longest wait for a new server to answer [s].

    Returns
    -------
    LocalServer
    """
    folder = server_folder()
    folder.mkdir(parents=True, exist_ok=True)
    with _start_lock(folder):
        return find_server() or start_server(timeout_s)


def connect_or_start(timeout_s=START_TIMEOUT_S):
    """The server named by ``PREFECT_API_URL`` if set, else :func:`ensure_server`.

    Parameters
    ----------
    timeout_s : float
        Longest wait for a new server to answer [s].

    Returns
    -------
    LocalServer
        Not owned when taken from ``PREFECT_API_URL`` or found running.

    Raises
    ------
    ServerError
        If ``PREFECT_API_URL`` is set but does not answer.
    """
    url = os.environ.get("PREFECT_API_URL", "").strip()
    if url:
        if not is_healthy(url):
            raise ServerError(f"PREFECT_API_URL={url} does not answer; start that server or unset the variable")
        parts = urlsplit(url)
        return LocalServer(url=url, host=parts.hostname or "", port=parts.port or 0, owned=False)
    return ensure_server(timeout_s)
