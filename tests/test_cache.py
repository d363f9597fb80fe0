"""Content cache: reruns recompute only what changed; corrupt entries are never trusted."""
import json
import shutil

import pandas as pd
import pytest

from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table

from conftest import MINI

TABLES = ["site_hazard", "asset_damage", "asset_loss", "asset_loss_curve"]


@pytest.fixture
def folder(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst


def stats(run):
    return json.loads((run / "manifest.json").read_text())["cache"]


def test_unchanged_rerun_recomputes_nothing_and_matches(folder):
    a = run_pure(folder / "quakefolio.toml")
    b = run_pure(folder / "quakefolio.toml")
    assert stats(a)["damage_pairs"] == {"computed": 5, "from_cache": 0}
    assert stats(b)["damage_pairs"] == {"computed": 0, "from_cache": 5}
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_hazard_change_at_one_site_recomputes_only_its_pairs(folder):
    run_pure(folder / "quakefolio.toml")
    curves = pd.read_csv(folder / "hazard_curves.csv")
    sel = (curves.site_id == "T03") & (curves.im == "PGA")
    curves.loc[sel, "annual_rate"] *= 1.5
    curves.to_csv(folder / "hazard_curves.csv", index=False)
    b = run_pure(folder / "quakefolio.toml")
    assert stats(b)["damage_pairs"] == {"computed": 1, "from_cache": 4}  # only (T03, TST-B) uses PGA there
    fresh = folder / "fresh"
    shutil.copytree(folder, fresh, ignore=shutil.ignore_patterns("output", "fresh"))
    c = run_pure(fresh / "quakefolio.toml")
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(b, name), read_table(c, name), check_exact=True)


def test_compute_mode_site_change_recomputes_that_site(folder):
    cfg = folder / "quakefolio_compute.toml"
    run_pure(cfg)
    ex = pd.read_csv(folder / "exposure.csv")
    ex.loc[ex.asset_id == "B1", "vs30_mps"] = 250
    ex.to_csv(folder / "exposure.csv", index=False)
    b = run_pure(cfg)
    s = stats(b)
    assert s["hazard_sites"] == {"computed": 1, "from_cache": 4}
    assert s["event_stage"] == {"computed": 1, "from_cache": 0}


def test_corrupt_entries_are_misses(folder):
    a = run_pure(folder / "quakefolio.toml")
    for f in (folder / "output" / "cache").rglob("*.npz"):
        f.write_bytes(b"not an archive")
    b = run_pure(folder / "quakefolio.toml")
    assert stats(b)["damage_pairs"]["computed"] == 5
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_cache_can_be_switched_off(folder):
    cfg = folder / "quakefolio.toml"
    cfg.write_text(cfg.read_text() + "\n[execution]\ncache = false\n")
    run_pure(cfg)
    assert not (folder / "output" / "cache").exists()


def test_unchanged_rerun_with_events_and_what_if_is_all_cached_and_identical(folder):
    cfg = folder / "quakefolio_compute.toml"
    text = cfg.read_text().replace(
        "[exposure]",
        '[[scenario.alternatives]]\nid = "stronger"\nassets = ["B1"]\nnew_class = "TST-B"\nretrofit_cost = 1000.0\n\n'
        "[portfolio]\nyears = 2000\nseed = 5\n\n[exposure]")
    cfg.write_text(text)
    a = run_pure(cfg)
    b = run_pure(cfg)
    assert all(v["computed"] == 0 for v in stats(b).values()), stats(b)
    names = sorted(p.stem for p in a.glob("*.parquet"))
    assert "whatif_portfolio" in names and "event_loss" in names
    for name in names:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)
