"""Benchmark: a classical run of 10^6 buildings on tabulated hazard, wall time and peak memory.

Run: ``python benchmarks/bench_classical_scale.py [--assets N] [--repeat K] [--path both|flow|no-flow] [--keep]``.

The case (invented): the demo's tabulated hazard curves (81 sites, 3 IMs, 40 levels), its
fragility library (7 classes in use) and its tabulated-hazard config, with the demo's
480 buildings repeated to ``N`` (default 10^6) rows: ids ``B0000001`` ..., positions moved
by up to about 200 m and its money columns (value, deductible, limit, contents, interruption) scaled
by a lognormal factor of 20% per row (seeded, so no two buildings repeat the same work), every
other column copied.  The run is the CLI's
``quakefolio run CONFIG --quiet`` on both paths: ``--no-flow``, then the default Prefect
flow path (``--path`` picks one; ``--flow`` is ``--path flow``), report included, each
repetition in a fresh output folder (nothing cached), in a subprocess under
``/usr/bin/time -v``.  The flow path's runs share one local Prefect server, as a user's
commands do: the first run starts it (its time is printed with the others and counts in
the median), the benchmark stops it at the end.  Printed: the wall time, CPU time (user +
system) and maximum resident set size of every repetition, their medians against the
targets of issue 12 (<= 20 s, <= 1.5 GB) as ``row:`` lines, and the stage times of the
manifest (``timings_s``) of the median run.

The machine is shared: note the load average printed beside the numbers.
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import re
import shutil
import statistics
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
DEMO = HERE.parent / "demo_portfolio"
TARGET_WALL_S, TARGET_RSS_GB = 20.0, 1.5
JITTER_DEG = 0.002  # about 200 m: keeps every building within the config's 5 km of a hazard site
SEED = 12


def build_case(folder, n_assets):
    """Write the invented case into ``folder``; return its config path."""
    folder.mkdir(parents=True, exist_ok=True)
    for name in ("hazard_curves.csv", "fragility_library.toml", "quakefolio_tabulated.toml"):
        shutil.copy(DEMO / name, folder / name)
    with open(DEMO / "exposure.csv", newline="", encoding="utf-8") as fh:
        demo = list(csv.DictReader(fh))
    columns = list(demo[0])
    pick = np.arange(n_assets) % len(demo)
    rng = np.random.default_rng(SEED)
    lon = np.array([float(r["lon"]) for r in demo])[pick] + rng.uniform(-JITTER_DEG, JITTER_DEG, n_assets)
    lat = np.array([float(r["lat"]) for r in demo])[pick] + rng.uniform(-JITTER_DEG, JITTER_DEG, n_assets)
    # every building its own value: the demo's money columns scaled by one factor per row (invented)
    scale = np.exp(0.2 * rng.standard_normal(n_assets))
    money = [c for c in ("replacement_value", "deductible", "limit", "contents_value", "interruption_value_per_day")
             if c in columns]
    rest = [c for c in columns if c not in ("asset_id", "lon", "lat", *money)]
    tails = [",".join(r[c] for c in rest) for r in demo]
    amounts = {c: np.array([float(r[c]) if r[c] else np.nan for r in demo]) for c in money}
    with open(folder / "exposure.csv", "w", encoding="utf-8") as fh:
        fh.write(",".join(["asset_id", "lon", "lat", *money, *rest]) + "\n")
        step = 100_000
        for start in range(0, n_assets, step):
            rows = range(start, min(start + step, n_assets))
            cols = {c: np.round(amounts[c][pick[start:rows.stop]] * scale[start:rows.stop]) for c in money}
            text = {c: np.where(np.isnan(v), "", np.char.mod("%.0f", np.nan_to_num(v))) for c, v in cols.items()}
            fh.write("".join(f"B{i + 1:07d},{lon[i]:.5f},{lat[i]:.5f},"
                             + ",".join(text[c][i - start] for c in money) + f",{tails[pick[i]]}\n" for i in rows))
    return folder / "quakefolio_tabulated.toml"


def _time_v(stderr):
    """Wall time [s], CPU time (user + system) [s] and maximum resident set size [GB] from ``/usr/bin/time -v``."""
    wall = re.search(r"Elapsed \(wall clock\) time \(h:mm:ss or m:ss\): (\S+)", stderr).group(1)
    seconds = 0.0
    for part in wall.split(":"):
        seconds = seconds * 60 + float(part)
    cpu = sum(float(re.search(rf"{kind} time \(seconds\): (\S+)", stderr).group(1)) for kind in ("User", "System"))
    rss_kb = int(re.search(r"Maximum resident set size \(kbytes\): (\d+)", stderr).group(1))
    return seconds, cpu, rss_kb / 1024 ** 2


def run_once(config, flow):
    """One cold run under ``/usr/bin/time -v``: (wall s, CPU s, max RSS GB, run folder)."""
    shutil.rmtree(config.parent / "output", ignore_errors=True)
    cmd = ["/usr/bin/time", "-v", sys.executable, "-m", "quakefolio.pipeline", "run", str(config), "--quiet"]
    if not flow:
        cmd.append("--no-flow")
    env = dict(os.environ, QUAKEFOLIO_STATE=str(config.parent / "state"))
    proc = subprocess.run(cmd, capture_output=True, text=True, cwd=str(config.parent), env=env, timeout=3600)
    if proc.returncode != 0:
        sys.exit(f"run failed (exit {proc.returncode}):\n{proc.stderr[-3000:]}")
    wall, cpu, rss = _time_v(proc.stderr)
    return wall, cpu, rss, Path(proc.stdout.strip().splitlines()[-1])


def measure(config, flow, repeat):
    """``repeat`` cold runs of one path; prints each and the medians as result rows."""
    path = "flow" if flow else "no-flow"
    print(f"{path} path, report included; load average before: {os.getloadavg()[0]:.2f}")
    results = []
    for k in range(repeat):
        wall, cpu, rss, run = run_once(config, flow)
        timings = json.loads((run / "manifest.json").read_text(encoding="utf-8")).get("timings_s", {})
        results.append((wall, cpu, rss, timings))
        print(f"  run {k + 1}: wall {wall:7.2f} s   CPU (user + system) {cpu:7.2f} s   max RSS {rss:5.2f} GB   "
              f"(load average {os.getloadavg()[0]:.2f})", flush=True)
    walls = [r[0] for r in results]
    wall, cpu = statistics.median(walls), statistics.median(r[1] for r in results)
    rss = statistics.median(r[2] for r in results)
    print(f"median of {repeat}: wall {wall:.2f} s, CPU {cpu:.2f} s, max RSS {rss:.2f} GB")
    timings = results[walls.index(sorted(walls)[len(walls) // 2])][3]
    print("stage times of the median run (manifest timings_s): "
          + ", ".join(f"{k} {v:.2f}" for k, v in timings.items()))
    n = f"{repeat} runs"
    print(f"row: 10^6 buildings, {path} path, wall time (median of {n}): {wall:.2f} s (target <= {TARGET_WALL_S:g} s) "
          f"{'ok' if wall <= TARGET_WALL_S else 'MISSED'} [{min(walls):.2f}-{max(walls):.2f}]", flush=True)
    print(f"row: 10^6 buildings, {path} path, peak memory (median of {n}): {rss:.2f} GB (target <= "
          f"{TARGET_RSS_GB:g} GB) {'ok' if rss <= TARGET_RSS_GB else 'MISSED'} "
          f"[{min(r[2] for r in results):.2f}-{max(r[2] for r in results):.2f}]", flush=True)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--assets", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--path", choices=("both", "flow", "no-flow"), default="both")
    parser.add_argument("--flow", action="store_true", help="the flow path only (as --path flow)")
    parser.add_argument("--keep", action="store_true", help="keep the temporary folder (printed)")
    args = parser.parse_args(argv)
    if not Path("/usr/bin/time").exists():
        print("skipped: /usr/bin/time not found")
        return 0
    paths = {"both": (False, True), "flow": (True,), "no-flow": (False,)}["flow" if args.flow else args.path]
    tmp = Path(tempfile.mkdtemp(prefix="quakefolio-scale-"))
    try:
        config = build_case(tmp / "case", args.assets)
        print(f"classical run, tabulated hazard (81 sites, 7 classes), {args.assets:,} buildings (invented)")
        for flow in paths:
            measure(config, flow, args.repeat)
        if args.keep:
            print(f"kept: {tmp}")
    finally:
        if True in paths:  # the runs left their shared local server for later commands: stop it with its state folder
            subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "server", "stop"], capture_output=True,
                           env=dict(os.environ, QUAKEFOLIO_STATE=str(tmp / "case" / "state")), timeout=120)
        if not args.keep:
            shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
