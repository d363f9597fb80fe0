"""What keeps a run of a million buildings cheap, checked on small runs: per-asset tables built
by index and written per chunk of assets, the wide loss-curve table, the report reading the
tables the run holds in memory (the same report as from the folder), the aggregated map, and
every stage's time in the manifest."""
from __future__ import annotations

import json
import re
import shutil
from dataclasses import replace

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from quakefolio.core.loss import loss_exceedance_rates
from quakefolio.pipeline.io.chunked import ChunkedTable
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.io.store import read_table, table_metadata
from quakefolio.pipeline.report import build_report
from quakefolio.pipeline.report.context import ReportRun, top_rows
from quakefolio.pipeline.report.figures import MAP_MAX_MARKERS, map_cells
from quakefolio.pipeline.report.sections_assets import _section_map
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.stages import load_inputs
from quakefolio.pipeline.stages.damage import combine_damage, compute_block, loss_curve_columns, plan_blocks

from conftest import MINI


@pytest.fixture(scope="module")
def mini(tmp_path_factory):
    dst = tmp_path_factory.mktemp("scale") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst / "quakefolio.toml"


@pytest.fixture(scope="module")
def damage(mini):
    inputs = load_inputs(mini)
    plan = plan_blocks(inputs)
    return inputs, combine_damage(inputs, plan, [compute_block(inputs, b) for b in plan.blocks])


def test_chunked_tables_do_not_depend_on_the_chunk_size(damage):
    _, product = damage
    for name in ("asset_damage", "asset_loss_curve"):
        table = product.tables[name]
        assert isinstance(table, ChunkedTable)
        whole = table.to_table()
        assert whole.num_rows == table.num_rows
        for chunk in (1, 3):
            assert replace(table, chunk=chunk).to_table().equals(whole)
        some = [whole["asset_id"][i].as_py() for i in (2, 0)]
        picked = whole.filter(pa.compute.is_in(whole["asset_id"], value_set=pa.array(some)))
        assert table.rows_of(some).equals(picked)  # table order, whatever the order asked


def test_asset_damage_rows_follow_the_exposure_then_the_states(damage):
    inputs, product = damage
    dmg = product.tables["asset_damage"].to_table().to_pandas()
    n_states = inputs.exposure.building_class.map(lambda c: inputs.library[c].n_states).to_numpy()
    assert dmg.asset_id.tolist() == np.repeat(inputs.exposure.asset_id.to_numpy(), n_states).tolist()
    first = dmg.groupby("asset_id", sort=False).damage_state_index.apply(list)
    assert all(v == list(range(1, len(v) + 1)) for v in first)


def test_loss_curve_is_one_row_per_asset_with_a_column_per_ratio(mini, damage):
    inputs, _ = damage
    run = run_pure(mini)
    curve = read_table(run, "asset_loss_curve")
    ratios = inputs.config.output.loss_curve_ratios
    names = loss_curve_columns(ratios)
    assert list(curve.columns) == ["asset_id", "replacement_value", *names, "lon", "lat"]  # lon, lat appended
    assert names[0] == "annual_rate_exceed_lr_0.001" and len(set(names)) == len(ratios)
    assert [float(n.removeprefix("annual_rate_exceed_lr_")) for n in names] == list(ratios)
    assert curve.asset_id.tolist() == inputs.exposure.asset_id.tolist()
    # each row is the loss-exceedance curve of the asset's (site, class) pair (core kernel, same inputs)
    for i, code in enumerate(inputs.exposure.building_class):
        dss = inputs.library[code]
        levels, rates = curves_for_im(inputs.hazard, dss.im)
        site = inputs.site_index[i]
        ds = dss.annual_rates(levels[site:site + 1], rates[site:site + 1], tail=inputs.config.fragility.tail)
        expected = loss_exceedance_rates(ds, dss.mean_damage_ratio, np.asarray(ratios), dss.cov)[0]
        np.testing.assert_allclose(curve.loc[i, names].to_numpy(float), expected, rtol=1e-12)
    units = table_metadata(run, "asset_loss_curve")["units"]
    assert units["replacement_value"] == "USD" and all(units[n] == "1/yr" for n in names)


@pytest.fixture(scope="module")
def reported_run(mini):
    text = mini.read_text()
    mini.write_text(text.replace("report = false", "report = true"))
    try:
        return run_pure(load_inputs(mini))
    finally:
        mini.write_text(text)


def test_manifest_times_every_stage(reported_run):
    timings = json.loads((reported_run / "manifest.json").read_text())["timings_s"]
    assert {"ingest_s", "damage_loss_s", "screening_whatif_s", "store_s", "report_s", "total_s"} <= set(timings)
    parts = sum(v for k, v in timings.items() if k not in ("total_s", "report_s"))  # the report overlaps the store
    assert 0 < parts <= timings["total_s"] + 1e-3 and 0 < timings["report_s"] <= timings["total_s"]


def _without_timings(html):
    """The report without its table of stage times (the manifest's times differ by when it is read)."""
    return re.sub(r"<h3>Software, timings and warnings</h3>.*?</section>", "", html, count=1, flags=re.S)


def test_report_from_memory_is_the_report_from_the_folder(reported_run):
    written = (reported_run / "report.html").read_text(encoding="utf-8")  # built from the tables in memory
    assert _without_timings(written) == _without_timings(build_report(reported_run))


def test_asset_rows_from_the_folder(mini):
    run = run_pure(mini)
    full = read_table(run, "asset_damage")
    ids = list(full.asset_id.unique()[[2, 0]])
    got = ReportRun(run).asset_rows("asset_damage", ids)
    pd.testing.assert_frame_equal(got, full[full.asset_id.isin(ids)].reset_index(drop=True), check_exact=True)
    assert len(ReportRun(run).asset_rows("asset_damage", [])) == 0


def test_top_rows_equal_the_full_sort():
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"asset_id": [f"A{i:05d}" for i in rng.permutation(5000)],
                          "p": np.where(rng.random(5000) < 0.05, np.nan, rng.integers(0, 50, 5000) / 50.0)})
    for n in (1, 7, 20, 4800, 5000):
        full = frame.sort_values(["p", "asset_id"], ascending=[False, True]).head(n)
        pd.testing.assert_frame_equal(top_rows(frame, "p", n), full)


def test_map_cells_keep_totals():
    rng = np.random.default_rng(11)
    n = 20_000
    d = pd.DataFrame({"lon": 10 + rng.normal(0, 0.05, n), "lat": 20 + rng.normal(0, 0.05, n),
                      "replacement_value": rng.uniform(1e5, 5e6, n), "eal_ratio": rng.uniform(1e-4, 1e-2, n)})
    cells, cell_km = map_cells(d)
    assert cell_km > 0 and len(cells) < n and cells.n_assets.sum() == n
    np.testing.assert_allclose(cells.replacement_value.sum(), d.replacement_value.sum(), rtol=1e-12)
    eal = d.replacement_value * d.eal_ratio
    np.testing.assert_allclose((cells.replacement_value * cells.eal_ratio).sum(), eal.sum(), rtol=1e-12)
    assert cells.lon.between(d.lon.min(), d.lon.max()).all() and cells.lat.between(d.lat.min(), d.lat.max()).all()


def test_map_of_many_assets_is_aggregated_and_says_so(tmp_path):
    n = MAP_MAX_MARKERS + 1
    rng = np.random.default_rng(5)
    ids = [f"X{i:06d}" for i in range(n)]
    value = rng.uniform(1e5, 1e6, n)
    pq.write_table(pa.table({"asset_id": ids, "replacement_value": value, "eal_ratio": rng.uniform(0, 1e-3, n)}),
                   tmp_path / "asset_loss.parquet")
    pq.write_table(pa.table({"asset_id": ids, "lon": 10 + rng.uniform(0, 0.1, n), "lat": 20 + rng.uniform(0, 0.1, n)}),
                   tmp_path / "run_assets.parquet")
    (tmp_path / "manifest.json").write_text(json.dumps({"config": {"scenario": {"currency": "USD"}}}))
    html = _section_map(ReportRun(tmp_path))
    assert "<img" in html and f"{n:,} assets" in html and "aggregated on a grid of" in html
    assert f"more than {MAP_MAX_MARKERS:,} assets are not drawn one by one" in html
