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

A server started by :func:`use_server` (every ``quakefolio run`` on the flow path,
``schedule``, the Dask path) is shared: it outlives the command and later commands reuse
it, so that only the first one pays for its start.  The record carries the owner's user id
and a random token that only the server's environment holds, so a stale record (the
process gone, or its id reused by another process, or the port taken by someone else's
process) is never mistaken for our server: it is replaced.  A keeper process (``python -m
quakefolio.pipeline.server keep``) stops the server once no command has used it for
``QUAKEFOLIO_SERVER_IDLE_S`` seconds (default :data:`DEFAULT_IDLE_S`); a command in
progress holds a shared lock on ``use.lock``, and the keeper stops the server only while
holding that lock exclusively, so it never stops a server under a running command.
:func:`stop_recorded` is ``quakefolio server stop``.  Concurrent first uses take the
exclusive ``start.lock``: one starts the server, the others find it.

If ``PREFECT_API_URL`` is set in the environment, that server is used as it is and none
is started.
"""
from __future__ import annotations

import fcntl
import json
import os
import secrets
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
from quakefolio.pipeline.io.atomic import atomic_write_text  # not io.store: the keeper stays light
from quakefolio.pipeline.io.claims import process_alive

__all__ = ["LOOPBACK", "DEFAULT_IDLE_S", "IDLE_ENV", "LocalServer", "ServerError", "server_folder", "find_server",
           "start_server", "ensure_server", "connect_or_start", "is_healthy", "idle_limit_s", "use_server",
           "recorded_server", "stop_recorded", "server_status"]

#: Environment variable: seconds a shared server may stay unused before its keeper stops it.
IDLE_ENV = "QUAKEFOLIO_SERVER_IDLE_S"

#: Idle time of a shared server when :data:`IDLE_ENV` is not set [s] (30 minutes).
DEFAULT_IDLE_S = 1800.0

#: Environment variable of the server (and its keeper) holding the record's token.
_TOKEN_ENV = "QUAKEFOLIO_SERVER_TOKEN"

#: The only address a server started by quakefolio listens on.
LOOPBACK = "127.0.0.1"

#: Seconds to wait for a new server to answer (it needs about 10-15 s on 2 cores).
START_TIMEOUT_S = 90.0

#: Seconds to wait for a recorded server of ours (its process running) to answer before another is started.
RECORDED_PATIENCE_S = 20.0


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
    keeper_pid: int | None = None
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
        if self.keeper_pid is not None:
            _signal(self.keeper_pid, signal.SIGTERM, group=False)
        _signal(self.pid, signal.SIGTERM)  # started with start_new_session: the group id is its pid
        if not _wait_exit(self, timeout_s):
            _signal(self.pid, signal.SIGKILL)
            _wait_exit(self, 5.0)
        _forget(self.pid)
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
        elif not _running(server.pid):
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


def _signal(pid, signum, group=True):
    try:
        (os.killpg if group else os.kill)(pid, signum)
    except (ProcessLookupError, PermissionError):
        pass


def _running(pid):
    """True if ``pid`` is a process that has not exited (a zombie counts as exited)."""
    try:
        stat = (Path("/proc") / str(pid) / "stat").read_text()
    except OSError:
        return process_alive(pid)
    return stat[stat.rindex(")") + 2:][:1] not in ("Z", "X")


def _read_record():
    try:
        info = json.loads((server_folder() / "server.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return info if isinstance(info, dict) else None


def _forget(pid):
    """Remove the record if it names the server ``pid``."""
    info = _read_record()
    if info is not None and info.get("pid") == pid:
        try:
            (server_folder() / "server.json").unlink()
        except OSError:
            pass


def _ours(pid, token):
    """True if ``pid`` is a running process of this user whose environment holds ``token``."""
    if not isinstance(pid, int) or pid <= 0 or not isinstance(token, str) or not token:
        return False
    proc = Path("/proc") / str(pid)
    try:
        if proc.stat().st_uid != os.getuid():
            return False
        environ = (proc / "environ").read_bytes().split(b"\0")
    except OSError:
        return False
    return _running(pid) and f"{_TOKEN_ENV}={token}".encode() in environ


def _listener_uid(port):
    """User id of the process listening on 127.0.0.1:``port`` (from ``/proc/net/tcp``), or None."""
    want = f"0100007F:{port:04X}"
    try:
        lines = Path("/proc/net/tcp").read_text().splitlines()[1:]
    except OSError:
        return None
    for line in lines:
        f = line.split()
        if len(f) > 7 and f[1] == want and f[3] == "0A":  # 0A: LISTEN
            return int(f[7])
    return None


def recorded_server():
    """The state folder's record if it names a running server of this user, else None.

    The record must name a live process owned by this user whose environment holds the
    record's token, and the port must be listened on by this user; anything else is a
    stale record (the caller replaces it).

    Returns
    -------
    dict or None
        ``url``, ``port``, ``pid``, ``keeper_pid``, ``idle_s``, ``database``, ``log`` ...
    """
    info = _read_record()
    if info is None or not _ours(info.get("pid"), info.get("token")):
        return None
    port = info.get("port")
    if not isinstance(port, int) or _listener_uid(port) not in (None, os.getuid()):
        return None
    return info


def find_server():
    """The server recorded in the state folder if it is ours, still running and answers, else None.

    Returns
    -------
    LocalServer or None
        Not owned by this process (:meth:`LocalServer.stop` leaves it running).
    """
    info = recorded_server()
    if info is None or not _answers(info.get("url", ""), info["pid"]):
        return None
    return LocalServer(url=info["url"], host=info["host"], port=info["port"], pid=info["pid"], owned=False,
                       database=Path(info["database"]), log=Path(info["log"]), keeper_pid=info.get("keeper_pid"))


def _answers(url, pid, patience_s=RECORDED_PATIENCE_S):
    """True once the recorded server ``pid`` answers at ``url``; False if it stops or stays silent ``patience_s``.

    The record's process is ours (token checked), so a slow answer on a busy machine is waited
    for: giving up at once would start a second server and retire this one.
    """
    deadline = time.monotonic() + patience_s
    while not is_healthy(url):
        if time.monotonic() > deadline or not _running(pid):
            return False
        time.sleep(0.2)
    return True


def _free_port():
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def _server_env(database, token):
    env = dict(os.environ)
    env[_TOKEN_ENV] = token
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
    with open(folder / "start.lock", "w") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def start_server(timeout_s=START_TIMEOUT_S, *, shared=False):
    """Start a Prefect server on 127.0.0.1 with its database in the state folder.

    The server runs as ``python -m prefect server start`` in a new session on a free
    loopback port, UI off, logging to ``server.log``, with a new random token in its
    environment; once healthy it is recorded in ``server.json`` (written atomically, with
    the token and this user's id).  An interruption (Ctrl-C, SIGTERM) before it is recorded
    stops it.

    Parameters
    ----------
    timeout_s : float
        Longest wait for the health check to answer [s].
    shared : bool
        Also start its keeper, which stops it after :func:`idle_limit_s` seconds unused;
        the returned server is then not owned (it outlives this process).

    Returns
    -------
    LocalServer
        Owned by this process unless ``shared``.

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
    token = secrets.token_hex(16)
    cmd = [sys.executable, "-m", "prefect", "server", "start", "--host", LOOPBACK, "--port", str(port),
           "--no-ui"]
    env = _server_env(database, token)
    with open(log_path, "ab") as log:
        proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT,
                                env=env, cwd=folder, start_new_session=True)
    server = LocalServer(url=url, host=LOOPBACK, port=port, pid=proc.pid, owned=True, database=database,
                         log=log_path, _process=proc)
    try:
        _wait_healthy(server, proc, timeout_s)
        info = {"url": url, "host": LOOPBACK, "port": port, "pid": proc.pid, "uid": os.getuid(), "token": token,
                "database": str(database), "log": str(log_path)}
        if shared:
            info["idle_s"] = idle_limit_s()
            server.keeper_pid = info["keeper_pid"] = _start_keeper(proc.pid, info["idle_s"], env, log_path)
        atomic_write_text(folder / "server.json", json.dumps(info, indent=2) + "\n")
    except BaseException:
        server.stop()
        raise
    server.owned = not shared
    return server


def _wait_healthy(server, proc, timeout_s):
    deadline = time.monotonic() + timeout_s
    while True:
        if proc.poll() is not None:
            raise ServerError(f"the Prefect server exited with status {proc.returncode}; "
                              f"its log {server.log} ends: {_tail(server.log)}")
        if is_healthy(server.url):
            return
        if time.monotonic() > deadline:
            raise ServerError(f"the Prefect server did not answer at {server.url} within {timeout_s:g} s; "
                              f"its log {server.log} ends: {_tail(server.log)}")
        time.sleep(0.1)


def idle_limit_s():
    """Seconds a shared server may stay unused: ``$QUAKEFOLIO_SERVER_IDLE_S`` or :data:`DEFAULT_IDLE_S`.

    Returns
    -------
    float
        Positive [s]; a value that is not a positive number falls back to the default.

    """
    try:
        value = float(os.environ.get(IDLE_ENV, ""))
    except ValueError:
        return DEFAULT_IDLE_S
    return value if 0 < value < float("inf") else DEFAULT_IDLE_S


def _start_keeper(pid, idle_s, env, log_path):
    env = dict(env, QUAKEFOLIO_STATE=str(server_folder().parent))
    cmd = [sys.executable, "-m", "quakefolio.pipeline.server", "keep", str(pid), repr(float(idle_s))]
    with open(log_path, "ab") as log:
        keeper = subprocess.Popen(cmd, stdin=subprocess.DEVNULL, stdout=log, stderr=subprocess.STDOUT, env=env,
                                  cwd=server_folder(), start_new_session=True)
    return keeper.pid


def _touch_use(folder):
    try:
        os.utime(folder / "last_used")
    except FileNotFoundError:
        (folder / "last_used").touch()


def _last_use(folder):
    times = []
    for name in ("last_used", "server.json"):
        try:
            times.append((folder / name).stat().st_mtime)
        except OSError:
            pass
    return max(times, default=0.0)


@contextmanager
def use_server(timeout_s=START_TIMEOUT_S):
    """The shared local server for the duration of a command: found running, or started.

    ``PREFECT_API_URL``, if set, names the server to use instead (nothing is started).
    Otherwise a shared lock on ``<server folder>/use.lock`` is held within the block (the
    keeper does not stop a server in use), the recorded server is reused if it is ours and
    answers, else a new one is started under the exclusive ``start.lock`` (concurrent first
    uses start one server) with its keeper.  The server is left running afterwards.

    Parameters
    ----------
    timeout_s : float
        Longest wait for a new server to answer [s].

    Yields
    ------
    LocalServer
        Not owned: leaving the block does not stop it.
    """
    if os.environ.get("PREFECT_API_URL", "").strip():
        yield connect_or_start(timeout_s)
        return
    folder = server_folder()
    folder.mkdir(parents=True, exist_ok=True)
    with open(folder / "use.lock", "a") as fh:
        fcntl.flock(fh, fcntl.LOCK_SH)
        with _start_lock(folder):
            server = find_server() or start_server(timeout_s, shared=True)
        _touch_use(folder)
        try:
            yield server
        finally:
            _touch_use(folder)


def stop_recorded(timeout_s=20.0):
    """``quakefolio server stop``: stop the recorded server and its keeper; one line saying what was done.

    Parameters
    ----------
    timeout_s : float
        Wait for a clean exit before killing [s].

    Returns
    -------
    str
        What was done.

    Raises
    ------
    ServerError
        If a command is using the server (it is left running).
    """
    folder = server_folder()
    info = _read_record()
    if info is None:
        return f"no Prefect server is recorded in {folder}"
    if recorded_server() is None:
        _forget(info.get("pid"))
        return f"the recorded Prefect server (pid {info.get('pid')}) is not running; its record was removed"
    with open(folder / "use.lock", "a") as fh:
        try:
            fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ServerError(f"the Prefect server at {info['url']} is in use by a running command; "
                              "it was left running (stop it when the command has ended)") from None
        _terminate(info["pid"], info.get("keeper_pid"), info["token"], timeout_s)
    return f"stopped the Prefect server at {info['url']} (pid {info['pid']})"


def _terminate(pid, keeper_pid, token, timeout_s):
    """Stop the server ``pid`` (its process group) and its keeper, then remove the record."""
    if keeper_pid is not None and keeper_pid != os.getpid() and _ours(keeper_pid, token):
        _signal(keeper_pid, signal.SIGTERM, group=False)
    _signal(pid, signal.SIGTERM)
    deadline = time.monotonic() + timeout_s
    while _running(pid) and time.monotonic() < deadline:
        time.sleep(0.1)
    if _running(pid):
        _signal(pid, signal.SIGKILL)
    _forget(pid)


def server_status():
    """``quakefolio server status``: one line about the recorded server.

    Returns
    -------
    str
        Its URL, pid, database, idle limit and seconds since last use; or that none runs.
    """
    folder = server_folder()
    info = recorded_server()
    if info is None:
        return f"no Prefect server is running for {folder.parent}"
    unused = time.time() - _last_use(folder)
    return (f"Prefect server at {info['url']} (pid {info['pid']}, database {info['database']}); "
            f"unused for {unused:.0f} s, stops after {info.get('idle_s', DEFAULT_IDLE_S):g} s unused")


def _keep(pid, idle_s):
    """The keeper's loop: stop server ``pid`` once unused for ``idle_s`` seconds and not in use."""
    folder = server_folder()
    step = min(5.0, max(0.2, idle_s / 4))
    token = os.environ.get(_TOKEN_ENV, "")
    while True:
        time.sleep(step)
        info = _read_record()
        if not _running(pid):
            _forget(pid)
            return 0
        replaced = info is None or info.get("pid") != pid  # replaced or forgotten: no new command will use it
        if not replaced and time.time() - _last_use(folder) < idle_s:
            continue
        with open(folder / "use.lock", "a") as fh:
            try:
                fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                continue  # a command is using it (even a replaced server: a command may still talk to it)
            if not replaced and time.time() - _last_use(folder) < idle_s:
                continue
            _terminate(pid, None, token, 20.0)
        return 0


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
        Not owned when taken from ``PREFECT_API_URL`` or found running.  Prefer
        :func:`use_server`, which shares the server between commands.

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


if __name__ == "__main__" and sys.argv[1:2] == ["keep"]:
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(0))
    sys.exit(_keep(int(sys.argv[2]), float(sys.argv[3])))
