"""Concurrent runs on one output folder: every run completes or fails cleanly, none loses another's work.

Four identical runs (``run --no-flow --quiet`` in subprocesses) start in the same second on one
copy of the mini inputs, whose ``runs/`` folder already holds the partial folders of two runs
that look foreign (one of another host, one of another boot of this host) and one left by a
dead process of this machine.  Every run completes (exit 0, its run folder on stdout, one
warning line naming the foreign partial folders) or fails cleanly (exit 2, one error line);
the completed runs have distinct complete folders, the foreign partial folders are
untouched, the dead one is removed, nothing outside the output folder changed, and
``LATEST`` names a complete run.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

from quakefolio.pipeline.io.claims import OWNER_FILE, this_writer
from quakefolio.pipeline.io.store import latest_run

from conftest import MINI
from hostile_support import assert_unchanged, one_line, snapshot

N_RUNS = 4
EXPECTED = {"site_hazard", "asset_damage", "asset_loss", "asset_loss_curve", "run_assets", "run_fragility"}


def _partial(runs, name, **record):
    folder = runs / name
    folder.mkdir(parents=True)
    (folder / "asset_loss.parquet").write_bytes(b"half-written by another machine")
    (folder / OWNER_FILE).write_text(json.dumps(dict(this_writer(), **record)))
    return folder


def test_four_runs_in_the_same_second_on_one_output_folder(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio.toml"
    runs = dst / "output" / "runs"
    foreign = [_partial(runs, ".partial-20250101T000000Z-0000abcd", host="build-node-7"),
               _partial(runs, ".partial-20250101T000001Z-0000abcd", boot_id="ffffffff-0000-0000-0000-000000000000")]
    dead = _partial(runs, ".partial-20250101T000002Z-0000abcd", pid=2 ** 22 + 1)  # no such process here
    kept = {p: snapshot(p) for p in foreign}
    before = snapshot(tmp_path, exclude=[dst / "output"])
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    procs = [subprocess.Popen([sys.executable, "-m", "quakefolio.pipeline", "run", str(cfg), "--no-flow", "--quiet"],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
             for _ in range(N_RUNS)]
    results = [(p.wait(timeout=240), p.stdout.read(), p.stderr.read()) for p in procs]
    completed = []
    for code, out, err in results:
        if code == 0:
            one_line(err, r"output/runs: 2 unfinished run folder\(s\) of another host, boot or container.*"
                          r"'\.partial-20250101T000000Z-0000abcd', '\.partial-20250101T000001Z-0000abcd'",
                     level="warning")
            completed.append(Path(out.strip()))
        else:
            assert code == 2, err
            one_line(err, ".")
    assert len(completed) == N_RUNS, results  # nothing here makes a run fail: all complete
    assert len(set(completed)) == len(completed)
    for run in completed:
        assert run.parent == runs.resolve() and {p.stem for p in run.glob("*.parquet")} >= EXPECTED
        assert json.loads((run / "manifest.json").read_text())["run_id"] == run.name
        assert not (run / OWNER_FILE).exists()
    assert latest_run(dst / "output") in completed
    for p in foreign:
        assert snapshot(p) == kept[p]
    assert not dead.exists()
    left = sorted(p.name for p in runs.iterdir() if p.name.startswith("."))
    assert left == sorted(p.name for p in foreign)  # no claim, trash or partial folder of ours left behind
    assert_unchanged(before, tmp_path, exclude=[dst / "output"])
