"""Content cache: reruns recompute only what changed; corrupt entries are never trusted."""
import json
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from quakefolio.pipeline.io.cache import StageCache
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


def _events_config(folder):
    cfg = folder / "quakefolio_compute.toml"
    cfg.write_text(cfg.read_text().replace("[exposure]", "[portfolio]\nyears = 500\nseed = 3\n\n[exposure]"))
    return cfg


def test_edited_table_entry_is_recomputed_and_replaced(folder):
    # a well-formed Parquet file with other numbers must not be trusted
    cfg = _events_config(folder)
    a = run_pure(cfg)
    entry = next((folder / "output" / "cache" / "events").iterdir())
    path = entry / "event_loss.parquet"
    frame = pd.read_parquet(path)
    frame["ground_up_loss"] = frame["ground_up_loss"] * 2.0 + 1.0
    frame.to_parquet(path, index=False)
    b = run_pure(cfg)
    assert stats(b)["event_stage"] == {"computed": 1, "from_cache": 0}
    for name in ("event_loss", "year_loss", "portfolio_ep", "portfolio_summary"):
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)
    c = run_pure(cfg)  # the replaced entry is trusted again
    assert stats(c)["event_stage"] == {"computed": 0, "from_cache": 1}
    pd.testing.assert_frame_equal(read_table(a, "event_loss"), read_table(c, "event_loss"), check_exact=True)


def test_corrupt_event_entry_is_replaced(folder):
    cfg = _events_config(folder)
    a = run_pure(cfg)
    entry = next((folder / "output" / "cache" / "events").iterdir())
    (entry / "year_loss.parquet").write_bytes(b"not parquet")
    (entry / "checks.json").write_text("{", encoding="utf-8")
    b = run_pure(cfg)
    assert stats(b)["event_stage"] == {"computed": 1, "from_cache": 0}
    assert json.loads((entry / "checks.json").read_text())["tables"]  # a complete entry again
    c = run_pure(cfg)
    assert stats(c)["event_stage"] == {"computed": 0, "from_cache": 1}
    for name in ("event_loss", "year_loss"):
        pd.testing.assert_frame_equal(read_table(a, name), read_table(c, name), check_exact=True)


def test_edited_array_entry_is_a_miss(tmp_path):
    # a valid .npz archive with the right key but other numbers is removed, not trusted
    cache = StageCache(tmp_path)
    cache.put("hazard", "ab" * 32, {"curves": np.linspace(0.0, 1.0, 7)})
    assert_array_equal(cache.get("hazard", "ab" * 32)["curves"], np.linspace(0.0, 1.0, 7))
    path = cache._path("hazard", "ab" * 32)
    with np.load(path) as data:
        stored = {k: data[k] for k in data.files}
    stored["curves"] = stored["curves"] + 1e-12
    np.savez(path, **stored)
    assert cache.get("hazard", "ab" * 32) is None
    assert not path.exists()


def test_table_entry_round_trip_and_checks_are_verified(tmp_path):
    cache = StageCache(tmp_path)
    frame = pd.DataFrame({"a": np.arange(4, dtype=np.int64), "b": np.linspace(0, 1, 4), "c": list("wxyz")})
    cache.put_tables("whatif", "cd" * 32, {"t": frame}, {"passed": True, "z": 0.5})
    tables, checks = cache.get_tables("whatif", "cd" * 32)
    pd.testing.assert_frame_equal(tables["t"], frame, check_exact=True)
    assert checks == {"passed": True, "z": 0.5}
    meta_path = cache.root / "whatif" / ("cd" * 32) / "checks.json"
    meta = json.loads(meta_path.read_text())
    meta["checks"]["passed"] = False  # an edited check is an edited entry
    meta_path.write_text(json.dumps(meta))
    assert cache.get_tables("whatif", "cd" * 32) is None
    assert not meta_path.parent.exists()
    cache.put_tables("whatif", "cd" * 32, {"t": frame}, {})
    cache.put_tables("whatif", "cd" * 32, {"t": frame.iloc[:2]}, {})  # an existing entry is replaced
    pd.testing.assert_frame_equal(cache.get_tables("whatif", "cd" * 32)[0]["t"], frame.iloc[:2], check_exact=True)
    assert sorted(p.name for p in (cache.root / "whatif").iterdir()) == ["cd" * 32]  # no leftovers
    assert StageCache(tmp_path, enabled=False).get_tables("whatif", "cd" * 32) is None


# --- edited and broken entries (hostile cases): never trusted, always replaced ----------------------------

def test_valid_damage_entry_with_eal_times_ten_is_not_trusted(folder):
    # a well-formed archive with its own key and stored digest, but the EAL ratios edited: a miss
    a = run_pure(folder / "quakefolio.toml")
    entries = sorted((folder / "output" / "cache" / "damage").rglob("*.npz"))
    assert entries
    for path in entries:
        with np.load(path) as data:
            stored = {k: data[k] for k in data.files}
        stored["eal"] = stored["eal"] * 10.0
        np.savez(path, **stored)
    b = run_pure(folder / "quakefolio.toml")
    assert stats(b)["damage_pairs"] == {"computed": 5, "from_cache": 0}
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)
    assert stats(run_pure(folder / "quakefolio.toml"))["damage_pairs"] == {"computed": 0, "from_cache": 5}


def test_valid_event_entry_with_aal_times_ten_is_not_trusted(folder):
    cfg = _events_config(folder)
    a = run_pure(cfg)
    entry = next((folder / "output" / "cache" / "events").iterdir())
    frame = pd.read_parquet(entry / "portfolio_summary.parquet")
    frame["aal"] = frame["aal"] * 10.0
    frame.to_parquet(entry / "portfolio_summary.parquet", index=False)
    b = run_pure(cfg)
    assert stats(b)["event_stage"] == {"computed": 1, "from_cache": 0}
    pd.testing.assert_frame_equal(read_table(a, "portfolio_summary"), read_table(b, "portfolio_summary"),
                                  check_exact=True)


def _whatif_entry(folder):
    entries = [p for p in (folder / "output" / "cache" / "whatif").iterdir() if not p.name.startswith(".")]
    assert len(entries) == 1
    return entries[0]


def _break(entry, how, tmp_path):
    if how == "missing checks":
        (entry / "checks.json").unlink()
    elif how == "truncated table":
        table = next(entry.glob("*.parquet"))
        table.write_bytes(table.read_bytes()[:100])
    else:
        shutil.rmtree(entry)
        if how == "a file":
            entry.write_text("not an entry")
        elif how == "a dangling link":
            entry.symlink_to(tmp_path / "gone")
        elif how == "a link to a folder elsewhere":
            (tmp_path / "elsewhere").mkdir()
            (tmp_path / "elsewhere" / "keep.txt").write_text("not the cache's")
            entry.symlink_to(tmp_path / "elsewhere")


@pytest.mark.parametrize("how", ["missing checks", "truncated table", "a file", "a dangling link",
                                 "a link to a folder elsewhere"])
def test_broken_whatif_entry_is_replaced(folder, tmp_path, how):
    cfg = folder / "quakefolio.toml"
    a = run_pure(cfg)
    entry = _whatif_entry(folder)
    _break(entry, how, tmp_path)
    b = run_pure(cfg)
    assert stats(b)["screening_and_what_if"] == {"computed": 1, "from_cache": 0}
    assert entry.is_dir() and not entry.is_symlink() and (entry / "checks.json").is_file()
    assert [p.name for p in entry.parent.iterdir()] == [entry.name]  # nothing moved aside or half-written left
    if how == "a link to a folder elsewhere":
        assert [p.name for p in (tmp_path / "elsewhere").iterdir()] == ["keep.txt"]  # never followed
    c = run_pure(cfg)
    assert stats(c)["screening_and_what_if"] == {"computed": 0, "from_cache": 1}
    for name in ("collapse_screening",):
        pd.testing.assert_frame_equal(read_table(a, name), read_table(c, name), check_exact=True)


def test_folder_in_place_of_an_array_entry_is_replaced(folder):
    a = run_pure(folder / "quakefolio.toml")
    entries = sorted((folder / "output" / "cache" / "damage").rglob("*.npz"))
    for path in entries:
        path.unlink()
        path.mkdir()
        (path / "x").write_text("not an archive")
    b = run_pure(folder / "quakefolio.toml")
    assert stats(b)["damage_pairs"] == {"computed": 5, "from_cache": 0}
    assert all(p.is_file() for p in entries)
    pd.testing.assert_frame_equal(read_table(a, "asset_loss"), read_table(b, "asset_loss"), check_exact=True)
