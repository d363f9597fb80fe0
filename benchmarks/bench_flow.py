"""Benchmark: what the Prefect flow costs on the demo, through the command line (wall time).

Run: ``python benchmarks/bench_flow.py``.  Every run is a ``quakefolio run`` process on a copy
of ``demo_portfolio/`` with a state folder of its own (so its own shared local Prefect
server), timed with ``/usr/bin/time -v`` where it exists (wall clock and peak memory), else
by the clock of this process.  Orchestration costs wall time in other processes (the
server) and waiting on its API, so wall time is measured here, not CPU time; the machine is
shared, so the load average is printed and ratios of runs measured side by side count more
than absolute seconds.

Rows (median over ``BENCH_FLOW_REPEATS`` rounds, default 3, each round running its
candidates right after one another):

* first demo run (empty cache), default flow path against ``--no-flow``, with the shared
  server already running (the usual case: any earlier command started it): target <= 1.1x;
* the same with the server stopped before (by its idle time or ``quakefolio server stop``; the
  run starts it again on the state folder's database): target <= 1.1x;
* the very first command on a new state folder, which also creates the server's database
  (once per installation; printed, no target);
* unchanged demo rerun on the default flow path, server running: target <= 3 s wall; it is
  written without a flow run when every stage is cached, from the tables of the run before
  (``--always-flow`` timed beside it).  The output folder is new, so every rerun's report draws
  the trend figure (its numbers change with the number of runs).
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPEATS = max(3, int(os.environ.get("BENCH_FLOW_REPEATS", "3")))
#: rounds with the server stopped before the run (each a flow run and a --no-flow run of the demo)
RESTARTS = 2
TIME_V = Path("/usr/bin/time")


def _env(tmp):
    # PYTHONDONTWRITEBYTECODE off: an installed quakefolio has its byte code cached, as every run here after the first
    env = {k: v for k, v in os.environ.items() if k not in ("PREFECT_API_URL", "PYTHONDONTWRITEBYTECODE")}
    env.update(QUAKEFOLIO_STATE=str(tmp / "state"), QUAKEFOLIO_SERVER_IDLE_S="900")
    return env


def _timed(argv, env):
    """(wall seconds, peak memory MiB or nan) of one command; it must succeed."""
    cmd = [sys.executable, "-m", "quakefolio.pipeline", *argv]
    if TIME_V.exists():
        cmd = [str(TIME_V), "-v", *cmd]
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"bench_flow: {' '.join(argv)} failed:\n{proc.stderr[-3000:]}")
    m = re.search(r"Elapsed \(wall clock\) time .*: (?:(\d+):)?(\d+):(\d+(?:\.\d+)?)", proc.stderr)
    if m:
        h, mnt, sec = m.groups()
        wall = int(h or 0) * 3600 + int(mnt) * 60 + float(sec)
    rss = re.search(r"Maximum resident set size \(kbytes\): (\d+)", proc.stderr)
    return wall, (int(rss.group(1)) / 1024 if rss else float("nan"))


def _fresh(demo):
    shutil.rmtree(demo / "output", ignore_errors=True)  # the content cache lives there: an empty cache


def _load():
    return "load average " + " ".join(f"{v:.2f}" for v in os.getloadavg())


def _row(label, values, target, unit):
    med = float(np.median(values))
    spread = f"[{min(values):.2f}-{max(values):.2f} over {len(values)} rounds]"
    if target is None:
        print(f"row: {label}: {med:.2f}{unit} {spread}", flush=True)
        return
    ok = "ok" if med <= target else "MISSED"
    print(f"row: {label}: {med:.2f}{unit} (target <= {target:g}{unit}) {ok} {spread}", flush=True)


def main():
    tmp = Path(tempfile.mkdtemp(prefix="quakefolio-bench-flow-"))
    env = _env(tmp)
    demo = tmp / "demo"
    shutil.copytree(HERE.parent / "demo_portfolio", demo, ignore=shutil.ignore_patterns("output", "__pycache__"))
    config = str(demo / "quakefolio.toml")
    run = ["run", config, "--quiet"]
    try:
        print(f"demo portfolio, {REPEATS} rounds; {_load()} at start", flush=True)
        _fresh(demo)
        cold, _ = _timed(run, env)  # no server yet: this run starts the shared one
        _fresh(demo)
        cold_base, _ = _timed([*run, "--no-flow"], env)
        first, base, mem = [], [], []
        for _ in range(REPEATS):
            _fresh(demo)
            t, m = _timed([*run, "--no-flow"], env)
            base.append(t)
            _fresh(demo)
            t, m2 = _timed(run, env)
            first.append(t)
            mem.append((m, m2))
        rerun, rerun_flow, rerun_base = [], [], []
        for _ in range(REPEATS):
            rerun.append(_timed(run, env)[0])
            rerun_flow.append(_timed([*run, "--always-flow"], env)[0])
            rerun_base.append(_timed([*run, "--no-flow"], env)[0])
        restart, restart_base = [], []
        for _ in range(RESTARTS):  # the server stopped (idle time, 'server stop'): the run starts it again
            _timed(["server", "stop"], env)
            _fresh(demo)
            restart.append(_timed(run, env)[0])
            _fresh(demo)
            restart_base.append(_timed([*run, "--no-flow"], env)[0])
        print(f"first run, --no-flow        {np.median(base):7.2f} s wall (peak {np.median([a for a, _ in mem]):.0f} MiB)")
        print(f"first run, flow             {np.median(first):7.2f} s wall (peak {np.median([b for _, b in mem]):.0f} MiB)")
        print(f"first run, flow, restarting the server {np.median(restart):7.2f} s wall (beside --no-flow "
              f"{np.median(restart_base):.2f} s)")
        print(f"first run, flow, new state folder {cold:7.2f} s wall (beside --no-flow {cold_base:.2f} s; one round)")
        print(f"rerun, default flow path    {np.median(rerun):7.2f} s wall")
        print(f"rerun, --always-flow        {np.median(rerun_flow):7.2f} s wall")
        print(f"rerun, --no-flow            {np.median(rerun_base):7.2f} s wall")
        print(_load() + " at end", flush=True)
        _row("first demo run, flow path vs no-flow path (server running)",
             [a / b for a, b in zip(first, base)], 1.1, "x")
        _row("first demo run, flow path vs no-flow path (server stopped before, started by the run)",
             [a / b for a, b in zip(restart, restart_base)], 1.1, "x")
        _row("first command on a new state folder, flow path vs no-flow path (the server's database created "
             "once per installation; one round)", [cold / cold_base], None, "x")
        _row("unchanged demo rerun, default flow path (server running), wall", rerun, 3.0, " s")
        _row("unchanged demo rerun, default flow path vs no-flow path", [a / b for a, b in zip(rerun, rerun_base)],
             1.1, "x")
        _row("unchanged demo rerun, --always-flow, wall", rerun_flow, None, " s")
    finally:
        subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "server", "stop"], env=env, capture_output=True)
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
