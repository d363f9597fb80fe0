"""Reliability: stage failures are named; a killed run never corrupts the run store."""
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest

from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.store import PARTIAL_PREFIX, latest_run, read_table

from conftest import MINI

EXPECTED = {"site_hazard", "hazard_at_return_periods", "asset_damage", "asset_loss", "asset_loss_curve",
            "disaggregation", "disaggregation_summary", "event_loss", "year_loss", "portfolio_ep",
            "portfolio_ep_curve", "portfolio_summary", "asset_event_loss", "portfolio_breakdown"}


def test_failing_stage_is_named_with_its_cause(tmp_path, monkeypatch, capsys):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    from quakefolio.pipeline.stages import blocks

    def broken(inputs, block):
        raise RuntimeError("simulated numerical failure")

    monkeypatch.setattr(blocks, "compute_block", broken)  # what the damage block task calls
    code = main(["run", "--no-flow", str(dst / "quakefolio.toml")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1
    assert "stage 'damage-and-loss-block' failed: RuntimeError: simulated numerical failure" in err[0]
    assert "quakefolio.toml" in err[0]
    assert not (dst / "output" / "LATEST").exists()


def _config(folder, cache):
    shutil.copytree(MINI, folder, ignore=shutil.ignore_patterns("output"))
    cfg = folder / "quakefolio_compute.toml"
    text = cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 150000\nseed = 3\n\n[exposure]")
    cfg.write_text(text.replace("site_block_size = 2", f"site_block_size = 2\ncache = {cache}"))
    return cfg


def _run(cfg):
    return subprocess.Popen([sys.executable, "-m", "quakefolio.pipeline", "run", "--no-flow", "--quiet", str(cfg)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _snapshot(run):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(run.iterdir())}


def _check_store(out, frozen):
    runs = out / "runs"
    visible = [p for p in runs.iterdir() if not p.name.startswith(".")] if runs.exists() else []
    for run in visible:  # every visible run is complete and readable
        assert {p.stem for p in run.glob("*.parquet")} >= EXPECTED, run
        json.loads((run / "manifest.json").read_text())
        read_table(run, "asset_loss")
    assert not [p for p in visible if p.name.startswith(PARTIAL_PREFIX)]
    if (out / "LATEST").exists():
        assert latest_run(out) in visible
    for run, snap in frozen.items():  # earlier runs untouched
        assert _snapshot(run) == snap


@pytest.mark.slow
@pytest.mark.parametrize("cache", ["true", "false"])
def test_kill_9_at_random_moments_never_corrupts_the_store(tmp_path, cache):
    cfg = _config(tmp_path / "work", cache)
    out = cfg.parent / "output"
    t0 = time.perf_counter()
    proc = _run(cfg)
    assert proc.wait(timeout=300) == 0, proc.stderr.read()
    duration = time.perf_counter() - t0
    reference = latest_run(out)  # the first complete run: its files must survive every kill (frozen), and the
    frozen = {reference: _snapshot(reference)}  # last run's tables must equal its own
    rng = np.random.default_rng(20261201)
    for moment in rng.uniform(0.2, duration, 5):  # 5 per cache setting: 10 seeded moments in all
        proc = _run(cfg)
        time.sleep(moment)
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=60)
        _check_store(out, frozen)
        if latest_run(out) not in frozen:
            frozen[latest_run(out)] = _snapshot(latest_run(out))
    proc = _run(cfg)
    assert proc.wait(timeout=300) == 0
    _check_store(out, frozen)
    final = latest_run(out)
    assert not list((out / "runs").glob(f"{PARTIAL_PREFIX}*"))  # stale partial folders were cleaned
    for name in EXPECTED:
        pd.testing.assert_frame_equal(read_table(final, name), read_table(reference, name), check_exact=True)
