"""The shared local Prefect server: reused by later commands, never two at once, stopped when idle or asked.

One Prefect server is started in this module (it takes several seconds), by two processes
at once: one server for both, a stale record replaced, reused by a later use, ended by
``server stop``.  Stale records, the stop command and the keeper's idle stop are tested on a
stand-in process recorded as the server (no Prefect).  No timed assertions: waits are
generous deadlines only.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import time

import pytest

from quakefolio.pipeline import server
from quakefolio.pipeline.cli import main

from conftest import seed_state

pytestmark = pytest.mark.flow


@pytest.fixture
def state(tmp_path, monkeypatch):
    """A fresh state folder for this test; no PREFECT_API_URL; whatever server is recorded is stopped after."""
    monkeypatch.setenv("QUAKEFOLIO_STATE", str(tmp_path / "state"))
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    monkeypatch.delenv(server.IDLE_ENV, raising=False)
    yield tmp_path / "state"
    try:
        server.stop_recorded()
    except server.ServerError:
        pass


def _record(state):
    path = state / "server" / "server.json"
    return json.loads(path.read_text(encoding="utf-8")) if path.exists() else None


def _wait(condition, timeout_s=120.0):
    deadline = time.monotonic() + timeout_s
    while not condition():
        assert time.monotonic() < deadline, "gave up waiting"
        time.sleep(0.2)


def _fake_server(state, idle_s=None):
    """A stand-in server process (sleeps, with a token in its environment) recorded as the state's server.

    With ``idle_s``, its keeper is started too.  Lets stop, idle stop and stale records be
    tested without starting Prefect.
    """
    folder = state / "server"
    folder.mkdir(parents=True, exist_ok=True)
    token = "f" * 32
    env = dict(os.environ, **{server._TOKEN_ENV: token})
    proc = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(600)"], env=env,
                            start_new_session=True)
    port = 9  # nothing of ours listens there: the listener check passes, the health check would not
    info = {"url": f"http://{server.LOOPBACK}:{port}/api", "host": server.LOOPBACK, "port": port, "pid": proc.pid,
            "uid": os.getuid(), "token": token, "database": str(folder / "prefect.db"),
            "log": str(folder / "server.log")}
    if idle_s is not None:
        info["idle_s"] = idle_s
        info["keeper_pid"] = server._start_keeper(proc.pid, idle_s, env, folder / "server.log")
    (folder / "server.json").write_text(json.dumps(info), encoding="utf-8")
    _wait(lambda: server.recorded_server() is not None, 30)  # the environment is readable once exec'd
    return proc, info


def test_stale_records_are_not_taken_for_our_server(state):
    proc, info = _fake_server(state)
    try:
        assert server.recorded_server()["pid"] == proc.pid
        path = state / "server" / "server.json"
        for change in ({"token": "0" * 32}, {"pid": os.getpid()}, {"pid": 2 ** 22 + 17}):
            path.write_text(json.dumps(dict(info, **change)), encoding="utf-8")
            assert server.recorded_server() is None, change
    finally:
        proc.kill()
        proc.wait()
    path.write_text(json.dumps(info), encoding="utf-8")
    assert server.recorded_server() is None  # the process is gone
    assert server.stop_recorded().endswith("its record was removed") and not path.exists()


def test_stop_command_ends_the_recorded_server_but_not_one_in_use(state, capsys):
    proc, info = _fake_server(state, idle_s=600)
    with open(state / "server" / "use.lock", "a") as fh:  # a command using it
        import fcntl

        fcntl.flock(fh, fcntl.LOCK_SH)
        assert main(["server", "stop"]) == 1
        assert "in use by a running command" in capsys.readouterr().err
        fcntl.flock(fh, fcntl.LOCK_UN)
    assert proc.poll() is None
    assert main(["server", "status"]) == 0
    assert f"pid {proc.pid}" in capsys.readouterr().out
    assert main(["server", "stop"]) == 0
    assert capsys.readouterr().out.startswith("stopped the Prefect server")
    assert proc.wait(timeout=60) is not None and _record(state) is None
    _wait(lambda: not server._running(info["keeper_pid"]))


def test_keeper_stops_an_idle_server_only_when_no_command_uses_it(state):
    proc, info = _fake_server(state, idle_s=1.0)
    folder = state / "server"
    with open(folder / "use.lock", "a") as fh:
        import fcntl

        fcntl.flock(fh, fcntl.LOCK_SH)
        time.sleep(4)  # several times the idle limit: the keeper must wait for the command
        assert proc.poll() is None and _record(state) is not None
        fcntl.flock(fh, fcntl.LOCK_UN)
    proc.wait(timeout=120)
    _wait(lambda: _record(state) is None and not server._running(info["keeper_pid"]))


def test_concurrent_first_uses_start_one_server_that_later_uses_reuse(state, capsys):
    """Two processes at once start one server (a stale record is replaced); this process reuses it; stop ends it."""
    seed_state(state)  # a migrated Prefect database (conftest): the server starts without migrating
    folder = state / "server"
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "server.json").write_text(json.dumps({"pid": os.getpid(), "token": "0" * 32, "port": 9}),
                                        encoding="utf-8")
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"}
    code = "from quakefolio.pipeline.server import use_server\nwith use_server() as s:\n    print(s.pid, s.url)\n"
    procs = [subprocess.Popen([sys.executable, "-c", code], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                              text=True) for _ in range(2)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [err[-2000:] for _, err in outs]
    assert outs[0][0] == outs[1][0]  # both found the one server
    pid, url = outs[0][0].split()
    assert _record(state)["pid"] == int(pid)  # the stale record was replaced
    assert server.is_healthy(url)  # left running after the commands
    with server.use_server() as again:
        assert (again.pid, again.url, again.owned) == (int(pid), url, False)
    assert main(["server", "stop"]) == 0
    assert capsys.readouterr().out.startswith(f"stopped the Prefect server at {url}")
    _wait(lambda: not server._running(int(pid)))
    assert _record(state) is None and not server.is_healthy(url)


def test_idle_limit_from_the_environment(monkeypatch):
    monkeypatch.setenv(server.IDLE_ENV, "90")
    assert server.idle_limit_s() == 90
    for bad in ("", "soon", "-5", "0", "inf"):
        monkeypatch.setenv(server.IDLE_ENV, bad)
        assert server.idle_limit_s() == server.DEFAULT_IDLE_S
