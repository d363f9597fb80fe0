"""Faults on the default Prefect path (``quakefolio run`` without ``--no-flow``), seen from the terminal.

Each faulty run must end with exactly one ``error:`` line naming the stage (or the Dask
address) and the cause, exit status 2 (the user can fix it), no traceback, Prefect's own
records in the run's log file, nothing changed outside the output folder, and the previous
run intact (its files, ``LATEST`` and the list of runs as they were).

Faults:

* an output folder that cannot be written: a tmpfs remounted read-only (as root, where a
  tmpfs can be mounted), else the folder made read-only with ``chmod`` (not root), else
  (root without mounts) a ``PermissionError`` injected into the store's table writer;
* a full disk: the same small tmpfs filled up, else ``ENOSPC`` injected into the store's
  table writer (a ``sitecustomize`` module on ``PYTHONPATH`` of the run's process);
* a Dask scheduler address where nothing listens, and one where another server answers.

A successful run prints nothing on stderr (progress bars are for a terminal; here stderr is
a pipe) and its Prefect records land in the log file.  SIGTERM stops a run like Ctrl-C:
exit 143, one line, and the Prefect server it was starting is gone.

The runs of this module share one Prefect server (``PREFECT_API_URL``), so that each run
does not start its own: that is the only difference from a plain ``quakefolio run``, except
in the SIGTERM test, which needs a run that starts the local server itself.
"""
from __future__ import annotations

import errno
import os
import shutil
import signal
import socket
import subprocess
import sys
import textwrap
import time
from contextlib import contextmanager
from pathlib import Path
from unittest import mock

import psutil
import pytest

from hostile_support import assert_unchanged, one_line, snapshot

from quakefolio.pipeline.server import stop_recorded

from conftest import MINI

pytestmark = pytest.mark.flow

#: size of the tmpfs that holds the inputs and the output folder (two runs of the mini inputs
#: take well under 1 MiB)
DISK_SIZE = "4m"

#: PYTHONPATH module that makes the store's table writer fail with the errno named in
#: QUAKEFOLIO_TEST_FAULT (used where no tmpfs can be mounted)
SITECUSTOMIZE = textwrap.dedent('''
    import errno, os
    _fault = os.environ.get("QUAKEFOLIO_TEST_FAULT")
    if _fault:
        from quakefolio.pipeline.io import store

        def _failing_write(self, name, *args, **kwargs):
            code = getattr(errno, _fault)
            raise OSError(code, os.strerror(code), str(self.partial / (name + ".parquet")))

        store.RunWriter.write_table = _failing_write
''')


def _mount_tmpfs(path):
    """Mount a small tmpfs on ``path``; False where that is not possible (not root, no mount rights)."""
    if os.geteuid() != 0 or shutil.which("mount") is None or os.environ.get("QUAKEFOLIO_TEST_NO_MOUNT"):
        return False
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={DISK_SIZE},mode=0755", "tmpfs", str(path)],
                          capture_output=True)
    return done.returncode == 0


def _remount(path, mode):
    subprocess.run(["mount", "-o", f"remount,{mode}", str(path)], check=True, capture_output=True)


@contextmanager
def _state(folder):
    """QUAKEFOLIO_STATE of this process set to ``folder`` within the block."""
    with mock.patch.dict(os.environ, {"QUAKEFOLIO_STATE": str(folder)}):
        yield


@pytest.fixture(scope="module")
def api_url(tmp_path_factory):
    """One Prefect server on 127.0.0.1 for the runs of this module (stopped afterwards)."""
    from quakefolio.pipeline.server import start_server

    state = tmp_path_factory.mktemp("fault-server")
    with _state(state):
        server = start_server()
        try:
            yield server.url
        finally:
            server.stop()


class Setup:
    """The inputs and output folder of this module's runs, and how to run ``quakefolio`` on them."""

    def __init__(self, root, api_url):
        self.root = root
        self.disk = root / "disk"
        self.disk.mkdir()
        self.mounted = _mount_tmpfs(self.disk)
        self.fill = self.disk / "fill"  # the file that fills the disk goes here: the mount's root stays as it was
        self.fill.mkdir()
        self.config = self.disk / "mini" / "quakefolio.toml"
        shutil.copytree(MINI, self.config.parent, ignore=shutil.ignore_patterns("output"))
        self.output = self.config.parent / "output"
        self.state = root / "state"  # Prefect state and logs of the runs: not on the faulty disk
        self.inject = root / "inject"
        self.inject.mkdir()
        (self.inject / "sitecustomize.py").write_text(SITECUSTOMIZE, encoding="utf-8")
        self.api_url = api_url

    def env(self, fault=None, api=True):
        env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_LOGGING_")}
        env.update(QUAKEFOLIO_STATE=str(self.state),
                   PYTHONPATH=os.pathsep.join(p for p in (str(self.inject), os.environ.get("PYTHONPATH")) if p))
        env.pop("PREFECT_API_URL", None)
        if api:
            env["PREFECT_API_URL"] = self.api_url
        if fault:
            env["QUAKEFOLIO_TEST_FAULT"] = fault
        return env

    def run(self, *extra, fault=None):
        # --always-flow: the inputs do not change between runs here, and a run whose every stage is
        # cached is otherwise written without a flow run; these faults are about the flow path
        return subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "run", str(self.config), "--always-flow",
                               *extra],
                              capture_output=True, text=True, env=self.env(fault), timeout=300)

    def logs(self):
        return sorted([*(self.state / "logs").glob("*.log"), *(self.output / "logs").glob("*.log")])

    def latest(self):
        return (self.output / "LATEST").read_text(encoding="utf-8").strip()

    def close(self):
        if self.mounted:
            subprocess.run(["umount", "-l", str(self.disk)], capture_output=True)


@pytest.fixture(scope="module")
def setup(tmp_path_factory, api_url):
    s = Setup(tmp_path_factory.mktemp("faults"), api_url)
    try:
        yield s
    finally:
        s.close()


@pytest.fixture(scope="module")
def previous(setup):
    """A successful run (the run every fault must leave intact) and the log files after it."""
    return setup.run(), setup.logs()


@contextmanager
def _intact(setup):
    """Assert the previous run, LATEST, the list of runs and everything outside the output folder survive."""
    latest = setup.latest()
    runs = sorted(p.name for p in (setup.output / "runs").iterdir())
    run_files = snapshot(setup.output / "runs" / latest)
    skip = [setup.output, setup.state, setup.fill]
    outside = snapshot(setup.root, exclude=skip)
    yield
    assert setup.latest() == latest
    assert sorted(p.name for p in (setup.output / "runs").iterdir()) == runs  # no new run, no partial left
    assert_unchanged(run_files, setup.output / "runs" / latest)
    assert_unchanged(outside, setup.root, exclude=skip)


def _prefect_log(line):
    """The log file named on an error line; it holds Prefect's records with the traceback."""
    assert "; Prefect log: " in line, line
    log = Path(line.rsplit("; Prefect log: ", 1)[1])
    text = log.read_text(encoding="utf-8")
    assert "Traceback" in text and "Finished in state Failed" in text
    return log


def test_successful_flow_run_prints_nothing_on_stderr_and_logs_to_a_file(setup, previous):
    done, logs = previous
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stderr == ""  # no Prefect log line, no warning (progress bars only on a terminal)
    assert done.stdout.startswith("CAUTION: ") and "Traceback" not in done.stdout
    # the output folder did not exist yet: the log is in the state folder (later runs log
    # into <output>/logs: tests/test_terminal.py)
    assert [log.parent for log in logs] == [setup.state / "logs"]
    text = logs[0].read_text(encoding="utf-8")
    assert "Beginning flow run" in text and "Task run 'store-run" in text
    assert "Finished in state Completed()" in text
    assert len(list((setup.output / "runs").iterdir())) == 1


def test_unwritable_output_folder_is_one_line(setup, previous):
    # Unwritable before the run starts: refused by the input checks, located at the config key,
    # before Prefect starts (nothing to log).
    if setup.mounted:
        make, undo = lambda: _remount(setup.disk, "ro"), lambda: _remount(setup.disk, "rw")
    elif os.geteuid() != 0:
        make, undo = lambda: _chmod_tree(setup.output, 0o555), lambda: _chmod_tree(setup.output, 0o755)
    else:
        pytest.skip("root without a tmpfs: the injected case below covers the write failure")
    with _intact(setup):
        make()
        try:
            done = setup.run()
        finally:
            undo()
        assert done.returncode == 2, done.stderr[-3000:]
        line = one_line(done.stderr, r"^error: .*quakefolio\.toml:\d+: column 'output\.folder': output folder .* is not "
                                     r"writable", out=done.stdout)
        assert str(setup.output) in line
        assert done.stdout == ""


def test_write_refused_during_the_run_is_one_line(setup, previous):
    # Unwritable once the stages run (the checks passed): the failing stage, the cause and the Prefect log.
    with _intact(setup):
        done = setup.run(fault="EACCES")
        assert done.returncode == 2, done.stderr[-3000:]
        line = one_line(done.stderr, r"^error: stage '[\w-]+' failed: \w*Error: \[Errno \d+\] Permission denied",
                        out=done.stdout)
        assert str(setup.output) in line and str(setup.config) in line
        _prefect_log(line)
        assert done.stdout == ""


def _chmod_tree(folder, mode):
    for p in [folder, *folder.rglob("*")]:
        if p.is_dir():
            p.chmod(mode)


def test_full_disk_is_one_line(setup, previous):
    filler = setup.fill / "filler"
    with _intact(setup):
        fault = None
        if setup.mounted:
            _fill(filler)
        else:
            fault = "ENOSPC"
        try:
            done = setup.run(fault=fault)
        finally:
            filler.unlink(missing_ok=True)
        assert done.returncode == 2, done.stderr[-3000:]
        one_line(done.stderr, r"^error: stage '[\w-]+' failed: \w*Error: \[Errno \d+\] No space left on device",
                 out=done.stdout)
        assert done.stdout == ""


def _fill(path):
    chunk = b"\0" * 65536
    with open(path, "wb", buffering=0) as fh:
        try:
            while True:
                fh.write(chunk)
        except OSError as exc:
            assert exc.errno == errno.ENOSPC


def _closed_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]  # nothing listens once the socket is closed


def test_dask_address_where_nothing_listens_is_one_line_at_once(setup, previous):
    address = f"tcp://127.0.0.1:{_closed_port()}"
    logs = setup.logs()
    with _intact(setup):
        t0 = time.monotonic()
        done = setup.run("--address", address)
        assert time.monotonic() - t0 < 60  # not Dask's 30 s connect retries; mostly the imports
        assert done.returncode == 2, done.stderr[-3000:]
        one_line(done.stderr, rf"^error: Dask scheduler {address}: connection refused", out=done.stdout)
    assert setup.logs() == logs  # checked before Prefect starts: nothing logged


def test_address_of_another_server_is_not_a_dask_scheduler(api_url):
    """Prefect's API answers HTTP on its port: the check asks who answers and names it (in-process, quick)."""
    from quakefolio.core.errors import InputError
    from quakefolio.pipeline.orchestration import check_scheduler

    port = api_url.rsplit(":", 1)[1].split("/")[0]
    t0 = time.monotonic()
    with pytest.raises(InputError, match=rf"Dask scheduler tcp://127.0.0.1:{port}: a server that is not Dask "
                                         r"answers there, not a Dask scheduler"):
        check_scheduler(f"tcp://127.0.0.1:{port}", timeout_s=1.0)
    assert time.monotonic() - t0 < 10


def test_sigterm_stops_the_run_and_the_embedded_server(setup, previous):
    """SIGTERM while the shared Prefect server starts: exit 143, one line, the server is gone, no record left."""
    with _intact(setup):
        proc = subprocess.Popen([sys.executable, "-m", "quakefolio.pipeline", "run", str(setup.config), "--always-flow"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                env=setup.env(api=False))
        try:
            children = _wait_for_children(proc)
            proc.send_signal(signal.SIGTERM)
            out, err = proc.communicate(timeout=240)  # generous: the machine may be loaded
        finally:
            if proc.poll() is None:
                proc.kill()
        assert proc.returncode == 143, err[-3000:]
        assert err == "terminated (SIGTERM)\n" and "Traceback" not in out
        gone, alive = psutil.wait_procs(children, timeout=15)
        assert not alive, [p.pid for p in alive]
    with _state(setup.state):  # had the server been recorded before the signal, it would be left for later commands
        assert stop_recorded().startswith("no Prefect server is recorded")


def _wait_for_children(proc, timeout_s=120):
    """The child processes of ``proc`` (the embedded server), once there are any."""
    me = psutil.Process(proc.pid)
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        children = me.children(recursive=True)
        if children:
            return children
        assert proc.poll() is None, proc.communicate()
        time.sleep(0.05)
    raise AssertionError("no embedded Prefect server started")
