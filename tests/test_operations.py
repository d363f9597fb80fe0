"""Operations: block tasks on Dask workers, scheduled reruns on a local Prefect server.

The slow tests start real processes: one Prefect server for the module (on 127.0.0.1,
with its database in a module state folder), a ``distributed.LocalCluster`` of two
worker processes, and ``quakefolio`` subprocesses.  Every process started here is
stopped in a ``finally`` even when a test fails.
"""
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import psutil
import pytest

from quakefolio.core.errors import InputError
from quakefolio.pipeline.io.config import load_config, resolve_execution
from quakefolio.pipeline.runner import SequentialExecutor, execute, run_pure
from quakefolio.pipeline.stages import load_inputs
from quakefolio.pipeline.io.store import latest_run, read_table

from conftest import MINI

CRON = "0 3 29 2 *"  # 03:00 on 29 February: never due while a test runs


def _copy_mini(dst, config="quakefolio_compute.toml", years=2000, execution=""):
    """The mini inputs in ``dst``; the compute config gets ``[portfolio] years`` and extra [execution] keys."""
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / config
    text = cfg.read_text(encoding="utf-8")
    if execution:
        assert "[execution]\n" in text
        text = text.replace("[execution]\n", "[execution]\n" + execution)
    if config == "quakefolio_compute.toml":
        text += f"\n[portfolio]\nyears = {years}\n"
    cfg.write_text(text, encoding="utf-8")
    return cfg


def _tables(run_dir):
    return sorted(p.stem for p in Path(run_dir).glob("*.parquet"))


def _assert_same_tables(run_a, run_b, compute=True):
    names = _tables(run_a)
    assert names == _tables(run_b)
    assert {"site_hazard", "asset_damage", "asset_loss"} <= set(names)
    if compute:
        assert {"event_loss", "portfolio_ep", "disaggregation"} <= set(names)
    for name in names:
        pd.testing.assert_frame_equal(read_table(run_a, name), read_table(run_b, name), check_exact=True,
                                      obj=name)


def _cache_computed(run_dir):
    stats = json.loads((Path(run_dir) / "manifest.json").read_text(encoding="utf-8"))["cache"]
    return {stage: v["computed"] for stage, v in stats.items()}


# --- fast: configuration, command line, worker functions in this process ---------------------------

def test_backend_from_config_and_command_line(tmp_path):
    cfg = load_config(_copy_mini(tmp_path / "a", execution='backend = "dask"\naddress = "tcp://127.0.0.1:8786"\n'))
    assert resolve_execution(cfg) == ("dask", "tcp://127.0.0.1:8786")
    assert resolve_execution(cfg, "local") == ("local", "")
    assert resolve_execution(cfg, None, "tcp://10.0.0.5:8786") == ("dask", "tcp://10.0.0.5:8786")
    local = load_config(_copy_mini(tmp_path / "b"))
    assert resolve_execution(local) == ("local", "")
    assert resolve_execution(local, "dask") == ("dask", "")  # no address: a local cluster
    assert resolve_execution(local, None, "tcp://10.0.0.5:8786") == ("dask", "tcp://10.0.0.5:8786")


def test_bad_dask_address_in_config_names_the_line(tmp_path):
    cfg = _copy_mini(tmp_path / "m", execution='address = "10.0.0.5:8786"\n')
    with pytest.raises(InputError, match=r"quakefolio_compute.toml:\d+: column 'execution.address': expected a Dask "
                                         r"scheduler address"):
        load_config(cfg)


@pytest.mark.parametrize("argv, message", [
    (["--executor", "local", "--address", "tcp://127.0.0.1:8786"], "--address: applies to --executor dask"),
    (["--no-flow", "--executor", "dask"], "--no-flow: runs without Prefect"),
])
def test_conflicting_execution_flags_are_user_errors(mini_config, capsys, argv, message):
    from quakefolio.pipeline.cli import main

    assert main(["run", str(mini_config), *argv]) == 2
    assert message in capsys.readouterr().err
    assert not (mini_config.parent / "output").exists()


def test_bad_address_flag_is_rejected_by_the_parser(mini_config, capsys):
    from quakefolio.pipeline.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["run", str(mini_config), "--address", "localhost:8786"])
    assert exc.value.code == 2
    assert "expected a Dask scheduler address" in capsys.readouterr().err


class _OtherProcess(SequentialExecutor):
    """Runs every block task as a process that holds none of the driver's products would:
    the process registry is cleared before each block, so each task reads the inputs from the
    config path (and, in compute mode, the published branch curves)."""

    def __init__(self):
        self.resolved = []

    def many(self, name, fn, ref, items):
        from quakefolio.pipeline.stages import blocks

        out = []
        for item in items:
            blocks.clear()
            out.append(fn(ref, item))
            self.resolved.extend(blocks.resolved_runs())
        return out


@pytest.mark.parametrize("config", ["quakefolio_compute.toml", "quakefolio.toml"])
def test_block_tasks_in_another_process_give_the_in_memory_results(tmp_path, config):
    """Block tasks take only a run reference and their block: rebuilt from files, as on a Dask
    worker, they give identical tables, and the work folder is removed."""
    from quakefolio.pipeline.stages import blocks

    remote_cfg = _copy_mini(tmp_path / "remote", config=config)
    reference = run_pure(_copy_mini(tmp_path / "reference", config=config))
    executor = _OtherProcess()
    try:
        run_dir = execute(load_inputs(remote_cfg), executor)
    finally:
        blocks.clear()
    assert executor.resolved and set(executor.resolved) == {str(remote_cfg.resolve())}
    assert not (tmp_path / "remote" / "output" / ".work").exists()
    _assert_same_tables(reference, run_dir, compute=config == "quakefolio_compute.toml")
    assert _cache_computed(run_dir) == _cache_computed(reference)


def test_block_task_refuses_inputs_that_differ_from_the_driver(tmp_path):
    from quakefolio.pipeline.stages import blocks
    from quakefolio.pipeline.stages.products import RunRef

    cfg = _copy_mini(tmp_path / "m", config="quakefolio.toml")
    blocks.clear()
    try:
        with pytest.raises(RuntimeError, match="differ from the driver's"):
            blocks.damage_task(RunRef(str(cfg.resolve()), "0" * 64), None)
    finally:
        blocks.clear()


# --- slow: a real Prefect server, a Dask cluster, scheduled runs ----------------------------------

@pytest.fixture(scope="module")
def ops_state(tmp_path_factory):
    """A state folder of its own, so that no server of the developer's is touched."""
    folder = tmp_path_factory.mktemp("ops-state")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("QUAKEFOLIO_STATE", str(folder))
        yield folder


@pytest.fixture(scope="module")
def prefect_server(ops_state):
    from quakefolio.pipeline.server import start_server

    server = start_server()
    try:
        yield server
    finally:
        server.stop()
        assert not psutil.pid_exists(server.pid) or psutil.Process(server.pid).status() == psutil.STATUS_ZOMBIE


def _cli_env(ops_state):
    env = dict(os.environ, QUAKEFOLIO_STATE=str(ops_state), PREFECT_RUNNER_POLL_FREQUENCY="1")
    env.pop("PREFECT_API_URL", None)  # the command finds the module's server through the state folder
    return env


@pytest.mark.slow
def test_local_server_listens_on_loopback_only(prefect_server, ops_state):
    from urllib.parse import urlsplit

    from quakefolio.pipeline.server import LOOPBACK, find_server

    assert LOOPBACK == "127.0.0.1"
    assert prefect_server.host == "127.0.0.1" and urlsplit(prefect_server.url).hostname == "127.0.0.1"
    assert prefect_server.owned
    assert prefect_server.database == ops_state / "server" / "prefect.db" and prefect_server.database.exists()
    found = find_server()  # what a later quakefolio process connects to
    assert found is not None and found.url == prefect_server.url and not found.owned
    proc = psutil.Process(prefect_server.pid)
    listening = [c.laddr for p in [proc, *proc.children(recursive=True)]
                 for c in p.net_connections(kind="inet") if c.status == psutil.CONN_LISTEN]
    assert listening, "the server listens on no socket"
    assert all(addr.ip == "127.0.0.1" for addr in listening), listening


@pytest.mark.slow
def test_dask_run_equals_local_run(tmp_path, prefect_server, ops_state):
    """The compute-mode mini portfolio (hazard, disaggregation, damage, events) on a two-process
    Dask cluster, through the command line and [execution] backend/address, gives the same
    tables as the plain local run (which the local thread-pool flow equals: test_flow.py)."""
    from distributed import Client, LocalCluster

    from quakefolio.pipeline.stages import blocks

    local = run_pure(_copy_mini(tmp_path / "local"))  # the local flow path equals this one (test_flow.py)
    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address="127.0.0.1:0")
    try:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")
        cfg = _copy_mini(tmp_path / "dask", execution=f'backend = "dask"\naddress = "{address}"\n')
        proc = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "run", str(cfg), "--quiet"],
                              capture_output=True, text=True, env=_cli_env(ops_state), timeout=300)
        assert proc.returncode == 0, proc.stderr
        assert "Traceback" not in proc.stderr and "Error" not in proc.stderr, proc.stderr
        with Client(address) as client:
            held = client.run(blocks.resolved_runs)  # the workers rebuilt the inputs from the config path
    finally:
        cluster.close()
    run_dir = Path(proc.stdout.strip().splitlines()[-1])
    assert run_dir == latest_run(tmp_path / "dask" / "output")
    assert any(str(cfg.resolve()) in runs for runs in held.values()), held
    assert not (tmp_path / "dask" / "output" / ".work").exists()
    computed = _cache_computed(run_dir)
    assert computed["hazard_sites"] > 0 and computed["disaggregation_sites"] > 0 and computed["event_stage"] == 1
    assert computed == _cache_computed(local)
    _assert_same_tables(local, run_dir)


def _snapshot(folder):
    return {str(p.relative_to(folder)): p.stat().st_mtime_ns for p in sorted(folder.rglob("*"))}


@pytest.mark.slow
def test_scheduled_runs_write_only_when_inputs_change(tmp_path, prefect_server, ops_state):
    """``quakefolio schedule`` serving a cron deployment; runs triggered through the API."""
    from prefect.client.orchestration import get_client
    from prefect.deployments import run_deployment

    from quakefolio.pipeline.orchestration import using_api
    from quakefolio.pipeline.scheduling import FLOW_NAME, deployment_name

    cfg = _copy_mini(tmp_path / "sched", config="quakefolio.toml")
    output = tmp_path / "sched" / "output"
    name = f"{FLOW_NAME}/{deployment_name(cfg)}"
    log = open(tmp_path / "serve.log", "w+")
    serve = subprocess.Popen([sys.executable, "-m", "quakefolio.pipeline", "schedule", str(cfg), "--cron", CRON],
                             stdout=log, stderr=subprocess.STDOUT, env=_cli_env(ops_state), start_new_session=True)
    try:
        with using_api(prefect_server.url):
            deadline = time.monotonic() + 120
            with get_client(sync_client=True) as client:
                while True:  # the deployment exists once the command serves it
                    assert serve.poll() is None, (tmp_path / "serve.log").read_text()
                    try:
                        deployment = client.read_deployment_by_name(name)
                        break
                    except Exception:  # noqa: BLE001 - not created yet
                        assert time.monotonic() < deadline, (tmp_path / "serve.log").read_text()
                        time.sleep(0.5)
            assert [s.schedule.cron for s in deployment.schedules] == [CRON]
            assert deployment.parameters == {"config_path": str(cfg.resolve())}

            def trigger():
                run = run_deployment(name, timeout=180, poll_interval=1)
                assert run.state is not None and run.state.is_completed(), (run.state,
                                                                             (tmp_path / "serve.log").read_text())

            trigger()  # first run: a run folder appears
            runs = sorted((output / "runs").iterdir())
            assert len(runs) == 1 and latest_run(output) == runs[0]
            before = _snapshot(output)
            trigger()  # unchanged inputs: nothing new is written
            assert _snapshot(output) == before
            exposure = tmp_path / "sched" / "exposure.csv"
            lines = exposure.read_text(encoding="utf-8").splitlines()
            head = lines[1].split(",")
            head[4] = str(float(head[4]) * 1.5)  # replacement_value of the first asset
            exposure.write_text("\n".join([lines[0], ",".join(head), *lines[2:]]) + "\n", encoding="utf-8")
            trigger()  # changed exposure: a new run and a change report
        runs = sorted((output / "runs").iterdir())
        assert len(runs) == 2 and latest_run(output) == runs[1]
        reports = sorted((output / "comparisons").iterdir())
        assert [r.name for r in reports] == [f"{runs[0].name}__{runs[1].name}"]
        assert (reports[0] / "change_assets.parquet").exists()
        causes = json.loads((reports[0] / "change_causes.json").read_text(encoding="utf-8"))
        assert causes["assets"]["by_primary_cause"]["exposure"] == 1
    finally:
        if serve.poll() is None:
            serve.send_signal(signal.SIGINT)  # Ctrl-C: the command stops serving and exits
            try:
                serve.wait(timeout=60)
            except subprocess.TimeoutExpired:
                os.killpg(serve.pid, signal.SIGKILL)
                serve.wait(timeout=10)
        log.seek(0)
        text = log.read()
        log.close()
    assert serve.returncode == 0, text
    assert f"inputs unchanged since run {runs[0].name}; nothing written" in text
    assert f"change report against run {runs[0].name}" in text
    assert f"using the Prefect server at {prefect_server.url}" in text  # found through the state folder
    assert "Traceback" not in text


@pytest.mark.slow
def test_schedule_run_once_without_waiting_for_the_clock(tmp_path, prefect_server, ops_state):
    cfg = _copy_mini(tmp_path / "once", config="quakefolio.toml")
    cmd = [sys.executable, "-m", "quakefolio.pipeline", "schedule", str(cfg), "--cron", CRON, "--run-once"]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=_cli_env(ops_state), timeout=300)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert proc.stdout.startswith("CAUTION: screening-level results")
    assert "finished Completed" in proc.stdout and "new run" in proc.stdout
    assert latest_run(tmp_path / "once" / "output") is not None


def test_schedule_rejects_a_bad_cron_before_starting_anything(mini_config, capsys):
    from quakefolio.pipeline.cli import main

    assert main(["schedule", str(mini_config), "--cron", "every day", "--run-once"]) == 2
    assert "Invalid cron string" in capsys.readouterr().err
    assert not (mini_config.parent / "output").exists()
