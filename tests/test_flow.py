"""The Prefect flow and the CLI end to end (embedded server; kept to a handful of tests)."""
import os
import shutil
import subprocess
import sys

import pandas as pd
import pytest

from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import latest_run, read_table

from conftest import DEMO, seed_state

TABLES = ["site_hazard", "hazard_at_return_periods", "asset_damage", "asset_loss", "asset_loss_curve"]


@pytest.mark.flow
def test_flow_equals_pure_library_path(mini_config):
    from quakefolio.pipeline.flow import run_flow

    flow_run = run_flow(mini_config, max_workers=2)
    pure_run = run_pure(mini_config)
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(flow_run, name), read_table(pure_run, name), check_exact=True)


@pytest.mark.flow
def test_demo_end_to_end_cli(tmp_path):
    demo = tmp_path / "demo"
    shutil.copytree(DEMO, demo, ignore=shutil.ignore_patterns("output", "__pycache__"))
    cfg = demo / "quakefolio.toml"  # the demo as shipped, its event set shortened to keep the suite fast
    text = cfg.read_text(encoding="utf-8")
    assert "years = 50000" in text
    cfg.write_text(text.replace("years = 50000", "years = 5000"), encoding="utf-8")
    env = dict(os.environ, QUAKEFOLIO_STATE=str(tmp_path / "state"))
    env.pop("PREFECT_API_URL", None)
    seed_state(tmp_path / "state")  # a migrated Prefect database: the command's server starts without migrating
    try:
        proc = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "run", str(cfg)],
                              capture_output=True, text=True, env=env, timeout=600)
        assert (tmp_path / "state" / "server" / "server.json").exists()  # the server is left for the next command
    finally:
        subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "server", "stop"], env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    out = proc.stdout + proc.stderr
    assert out.startswith("CAUTION: screening-level results")
    assert "ERROR" not in out and "Traceback" not in out and "error" not in proc.stderr.lower()
    assert "portfolio EAL" in out and "highest collapse probability" in out
    run = latest_run(demo / "output")
    assert run is not None
    loss = read_table(run, "asset_loss")
    assert len(loss) >= 400 and loss.building_class.nunique() >= 6
    assert (loss.eal > 0).all()
    assert (run / "report.html").read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
