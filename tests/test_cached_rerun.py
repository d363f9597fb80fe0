"""An unchanged rerun: written without a flow run, report sections from the cache, every stage timed.

A run whose inputs, settings and code match a run that completed takes every stage's result
from the content cache; ``quakefolio run`` then writes it without Prefect (the manifest says
so) unless ``--always-flow`` is given: the tables of the completed run are written again with
the new run's provenance, importing no numerical module, or, when that run is gone, the
stages run from the cache.  The report's table-drawn sections are cached too, and the
document must be the same byte for byte as one drawn from scratch.  No Prefect server is
started here: the runs are on the plain path.
"""
from __future__ import annotations

import json
import shutil
import subprocess
import sys

import pandas as pd

from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.cache import StageCache
from quakefolio.pipeline.io.store import latest_run, read_table, table_metadata
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


def test_report_from_cached_sections_and_trend_figure_is_the_same_document(mini_config, tmp_path):
    run_pure(mini_config)
    run = run_pure(mini_config)  # two runs, neither writing its report: the trend section draws its figure
    cache = StageCache(tmp_path / "cache-home")
    drawn = build_report(run, cache=cache)  # draws every section, as without a cache, and stores the table ones
    assert len(list((cache.root / "report").rglob("*.npz"))) == len(CACHED_SECTIONS) + 1  # and the trend figure
    taken = build_report(run, cache=cache)  # takes them from the cache
    assert taken == drawn


def test_always_flow_and_no_flow_together_are_a_user_error(mini_config, capsys):
    assert main(["run", str(mini_config), "--no-flow", "--always-flow"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: --always-flow") and err.count("\n") == 1


def _manifest(run):
    return json.loads((run / "manifest.json").read_text(encoding="utf-8"))


#: Runs ``quakefolio run CONFIG --quiet`` in a fresh interpreter and prints the top-level packages it imported.
_IMPORTS = """
import json, sys
from quakefolio.pipeline.cli import main
code = main(["run", sys.argv[1], "--quiet"])
print(json.dumps(sorted({m.split(".")[0] for m in sys.modules})))
sys.exit(code)
"""


def test_unchanged_rerun_takes_the_tables_of_the_complete_run_and_imports_no_numerical_module(mini_config):
    cfg = mini_config.parent / "quakefolio_compute.toml"  # computed hazard: the source models are read too
    first = run_pure(cfg)
    proc = subprocess.run([sys.executable, "-c", _IMPORTS, str(cfg)], capture_output=True, text=True, timeout=300,
                          cwd=cfg.parent)
    assert proc.returncode == 0, proc.stderr[-2000:]
    second, imported = latest_run(cfg.parent / "output"), set(json.loads(proc.stdout.splitlines()[-1]))
    assert second != first and proc.stdout.splitlines()[0] == str(second)
    assert not imported & {"scipy", "matplotlib", "prefect"}, sorted(imported & {"scipy", "matplotlib", "prefect"})
    manifest, before = _manifest(second), _manifest(first)
    assert manifest["tables_from_run"] == first.name and manifest["orchestration"] == FROM_CACHE
    assert manifest["row_counts"] == before["row_counts"] and manifest["inputs_sha256"] == before["inputs_sha256"]
    assert all(c["computed"] == 0 for c in manifest["cache"].values())
    assert {"ingest_s", "damage_loss_s", "store_s", "total_s"} <= set(manifest["timings_s"])
    for name in manifest["row_counts"]:  # each table names the run it belongs to
        meta, old = table_metadata(second, name), table_metadata(first, name)
        assert meta["run_id"] == second.name and {**meta, "run_id": old["run_id"]} == old
        pd.testing.assert_frame_equal(read_table(first, name), read_table(second, name), check_exact=True)


def test_unchanged_rerun_runs_the_stages_from_the_cache_when_the_complete_run_is_gone(mini_config, capsys):
    first = run_pure(mini_config)
    kept = {name: read_table(first, name) for name in TABLES}
    shutil.rmtree(first)
    assert main(["run", str(mini_config), "--quiet"]) == 0
    second = latest_run(mini_config.parent / "output")
    manifest = _manifest(second)
    assert manifest["orchestration"] == FROM_CACHE and "tables_from_run" not in manifest
    assert all(c["computed"] == 0 for c in manifest["cache"].values())
    for name in TABLES:
        pd.testing.assert_frame_equal(kept[name], read_table(second, name), check_exact=True)
    assert main(["run", str(mini_config), "--quiet"]) == 0  # and this run is taken by the next one
    assert _manifest(latest_run(mini_config.parent / "output"))["tables_from_run"] == second.name


def test_an_edited_table_of_the_complete_run_is_not_taken_again(mini_config):
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    first = run_pure(mini_config)
    kept = read_table(first, "asset_loss")
    table = pq.read_table(first / "asset_loss.parquet")
    doubled = table.set_column(table.schema.get_field_index("eal"), "eal", pc.multiply(table["eal"], 2.0))
    pq.write_table(doubled, first / "asset_loss.parquet", compression="zstd")  # same provenance, other numbers
    assert main(["run", str(mini_config), "--quiet"]) == 0
    second = latest_run(mini_config.parent / "output")
    assert "tables_from_run" not in _manifest(second)  # the stages ran from the content cache instead
    pd.testing.assert_frame_equal(kept, read_table(second, "asset_loss"), check_exact=True)
