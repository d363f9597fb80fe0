"""A run folder describes itself: run_assets and run_fragility round-trip the inputs exactly;
report and change report work from the run folder alone; atomic file writing."""
import os
import shutil

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from quakefolio.fragility import load_library
from quakefolio.pipeline.compare import compare_runs, write_change_report
from quakefolio.pipeline.io.ingest import read_exposure
from quakefolio.pipeline.report import build_report
from quakefolio.pipeline.io.run_inputs import ASSET_COLUMNS, library_from_frame, run_input_frames
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import RunFolder, atomic_write_text, table_metadata

from conftest import MINI


def _same(a, b):
    """Equal bit for bit, NaN equal to NaN."""
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    return a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))


def test_run_tables_round_trip_exposure_and_library(mini_config):
    run = run_pure(mini_config)
    library = load_library(mini_config.parent / "fragility.toml")
    exposure = read_exposure(mini_config.parent / "exposure.csv", library)
    folder = RunFolder(run)
    assets = folder.assets()
    assert list(assets.columns) == list(ASSET_COLUMNS)
    assert assets.asset_id.tolist() == exposure.asset_id.tolist()
    assert assets.building_class.tolist() == exposure.building_class.tolist()
    for col in ASSET_COLUMNS[1:]:
        if col != "building_class":
            assert _same(assets[col], exposure[col] if col in exposure.columns else np.nan), col
    assert pq.read_schema(run / "run_assets.parquet").field("asset_id").type == "string"
    assert table_metadata(run, "run_assets")["units"]["replacement_value"] == "USD"

    stored = folder.fragility()
    used = sorted(set(exposure.building_class))
    assert sorted(stored.classes) == used
    for code in used:
        a, b = library[code], stored[code]
        assert (a.im, a.names, a.collapse_index, a.description) == (b.im, b.names, b.collapse_index, b.description)
        for attr in ("medians", "betas", "mean_damage_ratio", "cov", "downtime_days", "casualty_rate"):
            assert _same(getattr(a, attr), getattr(b, attr)), (code, attr)
    assert table_metadata(run, "run_fragility")["units"]["median"] == "g"


def test_frames_of_chosen_classes_and_back():
    library = load_library(MINI / "fragility.toml")
    exposure = read_exposure(MINI / "exposure.csv", library)
    code = sorted(library.classes)[0]
    frames = run_input_frames(exposure, library, [code])
    frag = frames["run_fragility"]
    assert set(frag.building_class) == {code}
    assert frag.damage_state_index.tolist() == list(range(library[code].n_states))
    assert frag.is_collapse_state.sum() == 1
    back = library_from_frame(frag.sample(frac=1.0, random_state=1))  # row order does not matter
    assert back[code].names == library[code].names and _same(back[code].medians, library[code].medians)


def test_report_and_compare_of_runs_whose_inputs_are_gone(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio.toml"
    run_a = run_pure(cfg)
    exposure = dst / "exposure.csv"
    exposure.write_text(exposure.read_text().replace("B2,10.029,20.002,TST-A,2500000",
                                                     "B2,10.029,20.002,TST-A,3000000"))
    run_b = run_pure(cfg)
    # the user's input files go away after the runs
    for name in ("exposure.csv", "fragility.toml", "hazard_curves.csv", "quakefolio.toml"):
        os.remove(dst / name)
    text = build_report(run_b, previous_run=run_a)
    assert "could not be drawn" not in text and "predates" not in text
    assert "B2" in text and text.count("<img") >= 4  # hazard, fragility, map among them
    res = compare_runs(run_a, run_b)
    assets = res["change_assets"].set_index("asset_id")
    assert assets.loc["B2", "primary_cause"] == "exposure"
    assert write_change_report(run_a, run_b).is_dir()


def test_runs_without_stored_inputs_say_so(mini_config, tmp_path):
    run = run_pure(mini_config)
    old = tmp_path / "old_run"
    shutil.copytree(run, old)
    os.remove(old / "run_assets.parquet")
    os.remove(old / "run_fragility.parquet")
    text = build_report(old)
    assert "could not be drawn" not in text
    assert text.count("predates stored inputs") == 2  # fragility and map
    assert set(compare_runs(old, run)["change_assets"].primary_cause) == {"unchanged"}


def test_atomic_write_replaces_whole_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "LATEST"
    atomic_write_text(target, "one\n")
    atomic_write_text(target, "two\n")
    assert target.read_text() == "two\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["LATEST"]
    with pytest.raises(FileNotFoundError):
        atomic_write_text(tmp_path / "missing" / "x", "y")
    assert pd.Series(sorted(p.name for p in tmp_path.iterdir())).tolist() == ["LATEST"]
