"""An unchanged rerun: written without a flow run, report sections from the cache, every stage timed.

A run whose inputs, settings and code match a run that completed takes every stage's result
from the content cache; ``quakefolio run`` then writes it without Prefect (the manifest says
so) unless ``--always-flow`` is given.  The report's table-drawn sections are cached too, and
the document must be the same byte for byte as one drawn from scratch.  No Prefect server is
started here: the runs are on the plain path.
"""
from __future__ import annotations

import json

import pandas as pd

from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.cache import StageCache
from quakefolio.pipeline.io.store import latest_run, read_table
from quakefolio.pipeline.report import build_report
from quakefolio.pipeline.report.document import CACHED_SECTIONS
from quakefolio.pipeline.runner import FROM_CACHE, every_stage_cached, run_pure
from quakefolio.pipeline.server import server_folder
from quakefolio.pipeline.stages import load_inputs

TABLES = ["site_hazard", "hazard_at_return_periods", "asset_damage", "asset_loss", "asset_loss_curve"]


def _with_report(cfg):
    cfg.write_text(cfg.read_text(encoding="utf-8").replace("report = false", "report = true"), encoding="utf-8")
    return cfg


def test_unchanged_rerun_is_written_without_a_flow_and_equals_the_first(mini_config, capsys):
    cfg = _with_report(mini_config)
    inputs = load_inputs(cfg)
    assert not every_stage_cached(inputs)
    first = run_pure(inputs)
    assert every_stage_cached(load_inputs(cfg)) and not every_stage_cached(load_inputs(cfg), "hazard")
    had_server = (server_folder() / "server.json").exists()
    assert main(["run", str(cfg), "--quiet"]) == 0
    second = latest_run(cfg.parent / "output")
    assert capsys.readouterr().out.strip() == str(second) and second != first
    assert (server_folder() / "server.json").exists() == had_server  # no server was started for it
    manifest = json.loads((second / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["orchestration"] == FROM_CACHE
    assert manifest["cache"] and all(c["computed"] == 0 for c in manifest["cache"].values())
    assert {"ingest_s", "damage_loss_s", "store_s", "report_s"} <= set(manifest["timings_s"])
    assert all(v >= 0 for v in manifest["timings_s"].values())
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(first, name), read_table(second, name), check_exact=True)


def test_report_from_cached_sections_is_the_same_document(mini_config, tmp_path):
    run = run_pure(mini_config)  # no report written by the run: drawn here only
    cache = StageCache(tmp_path / "cache-home")
    drawn = build_report(run, cache=cache)  # draws every section, as without a cache, and stores the table ones
    assert len(list((cache.root / "report").rglob("*.npz"))) == len(CACHED_SECTIONS)
    taken = build_report(run, cache=cache)  # takes them from the cache
    assert taken == drawn


def test_always_flow_and_no_flow_together_are_a_user_error(mini_config, capsys):
    assert main(["run", str(mini_config), "--no-flow", "--always-flow"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: --always-flow") and err.count("\n") == 1
