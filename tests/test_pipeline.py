"""Pipeline stages without Prefect: ingest, per-pair computation, tables, run store."""
import json
import os

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.curves import prob_in_years
from quakefolio.core.loss import expected_annual_loss
from quakefolio.pipeline import stages
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import RunWriter, latest_run, read_table, table_metadata

TABLES = ["hazard_sites", "site_hazard", "hazard_at_return_periods", "asset_damage", "asset_loss", "asset_loss_curve",
          "collapse_screening", "site_risk_targeted_im", "run_assets", "run_fragility",
          "asset_consequences", "portfolio_consequences"]  # people and time


def test_pure_run_writes_a_complete_run(mini_config):
    run = run_pure(mini_config)
    out = mini_config.parent / "output"
    assert latest_run(out) == run
    for name in TABLES:
        assert (run / f"{name}.parquet").exists()
        meta = table_metadata(run, name)
        assert meta["run_id"] == run.name and meta["units"] and meta["caution"].startswith("CAUTION")
    manifest = json.loads((run / "manifest.json").read_text())
    assert set(manifest["row_counts"]) == set(TABLES)
    assert manifest["inputs"]["exposure"]["sha256"]
    assert manifest["hazard_ims_interpolated"] == ["SA_0.6"]
    assert not list((out / "runs").glob(".partial-*"))


def test_asset_results_follow_from_the_kernels(mini_config):
    run = run_pure(mini_config)
    damage = read_table(run, "asset_damage")
    loss = read_table(run, "asset_loss")
    inputs = stages.load_inputs(mini_config)
    lib = inputs.library
    for asset in loss.itertuples():
        dss = lib[asset.building_class]
        rates = damage[damage.asset_id == asset.asset_id].sort_values("damage_state_index")
        assert list(rates.damage_state) == list(dss.names)
        assert np.all(np.diff(rates.annual_rate_exceed.to_numpy()) <= 0)
        assert_allclose(asset.eal, expected_annual_loss(rates.annual_rate_exceed.to_numpy(),
                                                        dss.mean_damage_ratio, asset.replacement_value),
                        rtol=1e-12)
        assert_allclose(rates.prob_exceed_in_horizon, prob_in_years(rates.annual_rate_exceed, 50), rtol=1e-12)
        assert asset.annual_collapse_rate == rates.annual_rate_exceed.iloc[dss.collapse_index]
    # the two assets on site T02 ... share per-(site, class) results
    same = loss[(loss.building_class == "TST-A")]
    assert same.eal_ratio.nunique() == same.site_id.nunique()


def test_work_is_per_unique_site_class_pair(mini_config):
    inputs = stages.load_inputs(mini_config)
    blocks = stages.plan_blocks(inputs).blocks
    pairs = {(b.class_code, int(s)) for b in blocks for s in b.sites}
    expected = set(zip(inputs.exposure.building_class, inputs.site_index.tolist()))
    assert pairs == expected and sum(len(b.sites) for b in blocks) == len(expected)


def test_block_size_does_not_change_results(mini_config):
    a = run_pure(mini_config)
    text = mini_config.read_text().replace('[output]', '[execution]\nblock_size = 1\n\n[output]')
    mini_config.write_text(text)
    b = run_pure(mini_config)
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name))


def test_identical_inputs_give_identical_tables(mini_config):
    a, b = run_pure(mini_config), run_pure(mini_config)
    assert a != b
    for name in TABLES:
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_hazard_at_return_periods_flags(mini_config):
    run = run_pure(mini_config)
    uhs = read_table(run, "hazard_at_return_periods")
    assert set(uhs.flag) <= {"ok", "outside_range", "below_rate_floor"}
    assert uhs[uhs.flag == "ok"].im_level.notna().all()
    assert uhs[uhs.flag != "ok"].im_level.isna().all()


def test_failed_write_leaves_earlier_runs_and_latest_intact(mini_config, monkeypatch):
    first = run_pure(mini_config)
    out = mini_config.parent / "output"
    from quakefolio.pipeline.io import store

    def boom(*args, **kwargs):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(store.pq, "write_table", boom)
    from quakefolio.pipeline.runner import StageError

    with pytest.raises(StageError, match="stage 'store-run' failed: OSError: disk full") as info:
        run_pure(mini_config)
    assert isinstance(info.value.__cause__, OSError)
    assert latest_run(out) == first
    assert sorted(p.name for p in (out / "runs").iterdir()) == [first.name]


def test_writer_refuses_paths_outside_the_run(tmp_path):
    w = RunWriter(tmp_path, "20260101T000000Z-0000abcd")
    with pytest.raises(ValueError, match="outside the run folder"):
        w.write_text("../escape.txt", "x")
    w.abort()
    assert not (tmp_path / "escape.txt").exists()


def test_stale_partial_is_removed_and_never_visible(tmp_path):
    # a partial folder of this machine whose writer is dead (its pid now belongs to a process that
    # started later) is removed; one without an owner record is left alone
    from quakefolio.pipeline.io.claims import OWNER_FILE, this_writer

    dead = tmp_path / "runs" / ".partial-20250101T000000Z-0000abcd"
    dead.mkdir(parents=True)
    record = dict(this_writer(), start_ticks=this_writer()["start_ticks"] - 1)
    (dead / OWNER_FILE).write_text(json.dumps(record))
    (tmp_path / "runs" / ".partial-old").mkdir()
    w = RunWriter(tmp_path, "20260101T000000Z-0000abcd")
    assert not dead.exists()
    w.write_text("manifest.json", "{}")
    w.commit()
    assert (tmp_path / "LATEST").read_text().strip() == "20260101T000000Z-0000abcd"
    assert sorted(os.listdir(tmp_path / "runs")) == [".partial-old", "20260101T000000Z-0000abcd"]
    assert os.listdir(tmp_path / "runs" / "20260101T000000Z-0000abcd") == ["manifest.json"]  # no owner record


def test_parquet_and_csv_hazard_curves_agree():
    from conftest import DEMO
    from quakefolio.pipeline.io.ingest import read_hazard_curves

    a = read_hazard_curves(DEMO / "hazard_curves.csv")
    b = read_hazard_curves(DEMO / "hazard_curves.parquet")
    assert list(a.site_id) == list(b.site_id) and set(a.curves) == set(b.curves) == {"PGA", "SA_0.3", "SA_1.0"}
    for im in a.curves:
        np.testing.assert_array_equal(a.curves[im][0], b.curves[im][0])
        np.testing.assert_array_equal(a.curves[im][1], b.curves[im][1])


def test_hazard_unit_conversion(tmp_path):
    # 1 g = 9.80665 m/s2 (standard gravity, CGPM 1901)
    from conftest import MINI
    from quakefolio.pipeline.io.ingest import read_hazard_curves

    df = pd.read_csv(MINI / "hazard_curves.csv")
    df["im_level"] = df["im_level"] * 9.80665
    df.to_csv(tmp_path / "h.csv", index=False)
    g = read_hazard_curves(MINI / "hazard_curves.csv")
    ms2 = read_hazard_curves(tmp_path / "h.csv", im_unit="m/s2")
    assert_allclose(ms2.curves["PGA"][0], g.curves["PGA"][0], rtol=1e-12)
