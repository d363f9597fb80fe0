"""Positions on the run tables, ``quakefolio export`` (GeoParquet, GeoJSON, CSV), ``quakefolio history`` and
paths in the outputs relative to the config's folder.

References named beside the checks:
- GeoParquet specification 1.0.0 (Open Geospatial Consortium, 2023): file metadata key ``geo`` with
  ``version``, ``primary_column`` and per column ``encoding`` (WKB), ``geometry_types`` and ``bbox``
  [xmin, ymin, xmax, ymax]; a missing ``crs`` means OGC:CRS84 (longitude, latitude on WGS84); geometry
  columns stored as Parquet BYTE_ARRAY.
- OGC Simple Feature Access, Part 1: Common Architecture (OGC 06-103r4, 2011), Well-Known Binary: byte
  order (1 = little endian), uint32 geometry type (1 = Point), then x and y as IEEE 754 doubles.
- RFC 7946 (2016), The GeoJSON Format: a FeatureCollection of Features, Point coordinates
  [longitude, latitude] in WGS84, no ``crs`` member (section 4).
"""
from __future__ import annotations

import csv
import json
import math
import re
import shutil
import struct
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import MINI
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.runner import run_pure

_ASSET_TABLES = ("asset_loss", "asset_damage", "asset_loss_curve", "asset_consequences", "asset_event_loss",
                 "collapse_screening")
_SITE_TABLES = ("site_hazard", "hazard_at_return_periods", "disaggregation", "disaggregation_summary",
                "site_risk_targeted_im")


def _mini_compute(dst, *, report=False, years=2000):
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text(encoding="utf-8")
    if report:
        text = text.replace("report = false", "report = true")
    cfg.write_text(text + f"\n[portfolio]\nyears = {years}\n", encoding="utf-8")
    return cfg


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """One compute-mode run of the mini inputs with its report."""
    cfg = _mini_compute(tmp_path_factory.mktemp("export") / "mini", report=True)
    return run_pure(cfg)


def _exposure():
    with open(MINI / "exposure.csv", newline="", encoding="utf-8") as fh:
        return {r["asset_id"]: (float(r["lon"]), float(r["lat"])) for r in csv.DictReader(fh)}


def _table(path):
    return pq.read_table(path).replace_schema_metadata(None)


# --- positions on the tables and the site table -------------------------------------------------------------

def test_every_asset_and_site_table_carries_the_positions_of_its_assets_and_sites(run):
    exposure = _exposure()
    sites = _table(run / "hazard_sites.parquet").to_pydict()
    site_at = {s: (x, y) for s, x, y in zip(sites["site_id"], sites["lon"], sites["lat"])}
    for name in _ASSET_TABLES:
        t = _table(run / f"{name}.parquet").to_pydict()
        assert list(t)[-2:] == ["lon", "lat"], name  # appended after the earlier columns
        assert [(x, y) for x, y in zip(t["lon"], t["lat"])] == [exposure[a] for a in t["asset_id"]], name
    for name in _SITE_TABLES:
        t = _table(run / f"{name}.parquet").to_pydict()
        assert list(t)[-2:] == ["lon", "lat"], name
        assert [(x, y) for x, y in zip(t["lon"], t["lat"])] == [site_at[s] for s in t["site_id"]], name
    meta = json.loads(pq.read_schema(run / "asset_loss.parquet").metadata[b"quakefolio"])
    assert meta["units"]["lon"] == meta["units"]["lat"] == "deg"


def test_site_table_in_compute_mode_holds_position_vs30_and_assets(run):
    sites = _table(run / "hazard_sites.parquet").to_pandas()
    assert list(sites.columns) == ["site_id", "lon", "lat", "vs30_mps", "n_assets_default_vs30", "n_assets",
                                   "max_asset_distance_km"]
    # the mini exposure places every asset at its own site (no grid): each site holds one asset, Vs30 the
    # asset's own or the default (760 m/s, [hazard] default_vs30_mps) for B3, which gives none
    exposure = _exposure()
    assert sites.n_assets.sum() == len(exposure) and (sites.max_asset_distance_km == 0).all()
    with open(MINI / "exposure.csv", newline="", encoding="utf-8") as fh:
        vs30 = {(float(r["lon"]), float(r["lat"])): r["vs30_mps"] for r in csv.DictReader(fh)}
    for row in sites.itertuples():
        given = vs30[(row.lon, row.lat)]
        assert row.vs30_mps == (float(given) if given else 760.0)
        assert row.n_assets_default_vs30 == (0 if given else 1)


# --- export --------------------------------------------------------------------------------------------------

def _wkb_point(blob):
    """(lon, lat) of a little-endian WKB point (OGC 06-103r4: byte order, uint32 type, two doubles)."""
    assert len(blob) == 21
    order, kind, x, y = struct.unpack("<BIdd", blob)
    assert order == 1 and kind == 1
    return x, y


@pytest.fixture(scope="module")
def exported(run, tmp_path_factory):
    out = {}
    for fmt in ("geoparquet", "geojson", "csv"):
        assert main(["export", str(run), "--format", fmt, "--out", str(run.parent.parent / "exports" / fmt)]) == 0
        out[fmt] = run.parent.parent / "exports" / fmt
    return out


def _placed_tables(run):
    return sorted(p.stem for p in run.glob("*.parquet") if {"lon", "lat"} <= set(pq.read_schema(p).names))


def test_geoparquet_export_reads_back_with_wkb_points_crs_and_every_column(run, exported):
    names = _placed_tables(run)
    assert set(_ASSET_TABLES + _SITE_TABLES + ("hazard_sites", "run_assets")) <= set(names)
    assert sorted(p.stem for p in exported["geoparquet"].glob("*.parquet")) == names
    for name in names:
        path = exported["geoparquet"] / f"{name}.parquet"
        source, got = _table(run / f"{name}.parquet"), pq.read_table(path)
        geo = json.loads(got.schema.metadata[b"geo"])
        assert geo["version"] == "1.0.0" and geo["primary_column"] == "geometry"
        column = geo["columns"]["geometry"]
        assert column["encoding"] == "WKB" and column["geometry_types"] == ["Point"]
        assert "crs" not in column  # GeoParquet 1.0: omitted crs = OGC:CRS84 (lon, lat on WGS84)
        lon, lat = source["lon"].to_numpy(), source["lat"].to_numpy()
        assert column["bbox"] == [lon.min(), lat.min(), lon.max(), lat.max()]
        assert got.column_names == source.column_names + ["geometry"]
        assert got.drop_columns(["geometry"]).to_pandas().equals(source.to_pandas()), name  # NaN where NaN
        points = [_wkb_point(b) for b in got["geometry"].to_pylist()]
        assert points == list(zip(lon.tolist(), lat.tolist())), name
        parquet_schema = pq.ParquetFile(path).schema
        assert parquet_schema.column(got.column_names.index("geometry")).physical_type == "BYTE_ARRAY"


def _same(a, b):
    if isinstance(b, float) and not math.isfinite(b):
        return a is None  # JSON has no NaN or infinity (RFC 8259, section 6): written as null
    return a == b


def test_geojson_export_is_a_feature_collection_of_lon_lat_points_with_every_column(run, exported):
    for name in _placed_tables(run):
        doc = json.loads((exported["geojson"] / f"{name}.geojson").read_text(encoding="utf-8"))
        assert doc["type"] == "FeatureCollection" and "crs" not in doc  # RFC 7946: WGS84 lon/lat only
        source = _table(run / f"{name}.parquet").to_pydict()
        assert len(doc["features"]) == len(source["lon"])
        props = [c for c in source if c not in ("lon", "lat")]
        for i, feature in enumerate(doc["features"]):
            assert feature["type"] == "Feature"
            assert feature["geometry"] == {"type": "Point", "coordinates": [source["lon"][i], source["lat"][i]]}
            assert list(feature["properties"]) == props
            assert all(_same(feature["properties"][c], source[c][i]) for c in props), (name, i)
        lons, lats = source["lon"], source["lat"]
        assert doc["bbox"] == [min(lons), min(lats), max(lons), max(lats)]


def test_csv_export_holds_every_column_and_row(run, exported):
    for name in _placed_tables(run):
        source = _table(run / f"{name}.parquet")
        with open(exported["csv"] / f"{name}.csv", newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
        assert rows[0] == source.column_names and len(rows) == source.num_rows + 1
        col = rows[0].index("lon")
        assert [float(r[col]) for r in rows[1:]] == source["lon"].to_pylist()


def test_export_writes_only_new_files(run, exported, capsys, tmp_path):
    target = exported["csv"]
    before = {p.name: p.read_bytes() for p in target.iterdir()}
    assert main(["export", str(run), "--format", "csv", "--out", str(target)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "exists and is not empty" in err[0] and "Traceback" not in err[0]
    assert {p.name: p.read_bytes() for p in target.iterdir()} == before
    assert main(["export", str(run), "--out", str(run / "inside")]) == 2  # finished runs are never modified
    assert "finished runs are never modified" in capsys.readouterr().err and not (run / "inside").exists()
    # the default place: <output>/exports/<run_id>-<format>, from the output folder standing for LATEST
    assert main(["export", str(run.parent.parent), "--format", "geojson"]) == 0
    assert (run.parent.parent / "exports" / f"{run.name}-geojson" / "asset_loss.geojson").is_file()
    assert not list((run.parent.parent / "exports").glob(".partial-*"))


# --- paths relative to the config's folder -----------------------------------------------------------------

def _text_of(path):
    """What a reader sees of an output file: text files as they are (the report without its inline images),
    Parquet tables as their schema metadata and every text cell."""
    if path.suffix == ".parquet":
        t = pq.read_table(path)
        parts = [v.decode("utf-8", "replace") for v in (t.schema.metadata or {}).values()]
        for c in t.column_names:
            if pa.types.is_string(t[c].type) or pa.types.is_large_string(t[c].type):
                parts += [v for v in t[c].to_pylist() if v]
        return "\n".join(parts)
    text = path.read_text(encoding="utf-8")
    return re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text)


def test_no_absolute_local_path_in_the_run_folder(run):
    files = sorted(p for p in run.iterdir() if p.is_file())
    assert {"manifest.json", "report.html"} <= {p.name for p in files}
    config_folder = run.parent.parent.parent
    for path in files:
        text = _text_of(path)
        for local in (str(config_folder.parent), str(config_folder.resolve().parent), f"{Path.home()}/"):
            assert local not in text, f"{path.name} names {local}"
    manifest = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["inputs"]["exposure"]["path"] == "exposure.csv"
    assert manifest["config"]["output"]["folder"] == "output"
    assert any(w.startswith("sources_alt.toml:") for w in manifest["warnings"])  # located, relative


# --- history ---------------------------------------------------------------------------------------------------

def test_history_lists_three_runs_their_figures_and_what_changed(tmp_path, capsys):
    cfg = _mini_compute(tmp_path / "mini")
    runs = [run_pure(cfg)]
    exposure = cfg.parent / "exposure.csv"
    exposure.write_text(exposure.read_text().replace("B2,10.029,20.002,TST-A,2500000",
                                                     "B2,10.029,20.002,TST-A,5000000"))
    runs.append(run_pure(cfg))
    library = cfg.parent / "fragility.toml"
    library.write_text(library.read_text().replace("median = 0.6", "median = 0.5", 1))
    runs.append(run_pure(cfg))
    output = cfg.parent / "output"
    assert main(["history", str(output)]) == 0
    printed = capsys.readouterr().out
    positions = [printed.index(r.name) for r in runs]
    assert positions == sorted(positions)  # oldest first
    assert "changed inputs: exposure: exposure.csv" in printed
    assert "changed inputs: fragility_library: fragility.toml" in printed

    table = pq.read_table(output / "history.parquet").to_pandas()
    assert table.run_id.tolist() == [r.name for r in runs]
    assert table.changed_inputs.tolist() == ["", "exposure: exposure.csv", "fragility_library: fragility.toml"]
    for i, r in enumerate(runs):  # each figure read back from the run's own tables
        loss = pq.read_table(r / "asset_loss.parquet").to_pandas()
        ep = pq.read_table(r / "portfolio_ep.parquet").to_pandas()
        summary = pq.read_table(r / "portfolio_summary.parquet").to_pandas()
        row = table.iloc[i]
        assert row.classical_eal == pytest.approx(loss.eal.sum(), rel=1e-12)
        assert row.expected_collapses_in_horizon == pytest.approx(loss.collapse_prob_in_horizon.sum(), rel=1e-12)
        assert row.event_aal == summary.set_index("basis").aal["ground_up"]
        for rp in (100, 250, 475):  # [portfolio] return_periods_yr by default (2475 yr is beyond 2,000 years)
            assert row[f"pml_aep_{rp}yr"] == ep[(ep.basis == "ground_up") & (ep.return_period_yr == rp)].aep_loss.item()
    eal = table.classical_eal.to_numpy()
    assert np.isnan(table.classical_eal_change_pct.iloc[0])
    np.testing.assert_allclose(table.classical_eal_change_pct.iloc[1:], 100 * (eal[1:] - eal[:-1]) / eal[:-1],
                               rtol=1e-12)
    assert table.classical_eal_change_pct.iloc[1] > 0  # a doubled value adds loss

    # a second call replaces its own table; a foreign file of that name is left alone
    assert main(["history", str(output)]) == 0
    (output / "history.parquet").write_text("not ours")
    assert main(["history", str(output)]) == 2
    assert (output / "history.parquet").read_text() == "not ours"
    assert "is not a quakefolio run history" in capsys.readouterr().err


# --- the pieces, on small inputs --------------------------------------------------------------------------

def test_point_wkb_is_the_simple_features_layout():
    # OGC 06-103r4, 8.2: POINT(1 2) little endian = 01, uint32 1, double 1.0, double 2.0 (IEEE 754:
    # 1.0 = 0x3FF0000000000000, 2.0 = 0x4000000000000000, written low byte first)
    from quakefolio.pipeline.io.geo_formats import point_wkb

    got = point_wkb([1.0, np.nan, -140.63362], [2.0, 5.0, -35.12408])
    assert got[0].as_py().hex() == "0101000000" + "000000000000f03f" + "0000000000000040"
    assert got[1].as_py() is None and got.null_count == 1  # no position: null geometry
    assert _wkb_point(got[2].as_py()) == (-140.63362, -35.12408)


def test_positions_per_chunk_equal_positions_of_the_whole_table():
    from quakefolio.pipeline.io.chunked import ChunkedTable
    from quakefolio.pipeline.io.coordinates import Positions, with_coordinates

    ids = pa.array([f"A{i}" for i in range(7)])
    lon, lat = np.arange(7) * 0.5 - 1.0, np.arange(7) * -0.25

    def build(assets):  # three rows per asset, as a damage table with three states
        rows = np.repeat(assets, 3)
        return pa.table({"asset_id": ids.take(pa.array(rows, type=pa.int64())),
                         "state": np.tile([1, 2, 3], len(assets))})

    assets = Positions.of(ids, lon, lat)
    sites = Positions.of(["S1"], [0.0], [0.0])
    chunked = with_coordinates(ChunkedTable(7, build, 21, ids, chunk=2), assets, sites)
    whole = chunked.to_table()  # written in chunks of 2 assets
    assert whole.column_names == ["asset_id", "state", "lon", "lat"]
    assert whole["lon"].to_pylist() == np.repeat(lon, 3).tolist()
    assert whole["lat"].to_pylist() == np.repeat(lat, 3).tolist()
    assert chunked.rows_of(["A5", "A1"])["lon"].to_pylist() == [lon[1]] * 3 + [lon[5]] * 3
    # a row naming no asset (a whole alternative's total row) has no position; a table with positions is kept
    frame = with_coordinates(pa.table({"asset_id": pa.array(["A3", None]), "x": [1.0, 2.0]}), assets, sites)
    assert frame["lon"].to_pylist()[0] == lon[3] and np.isnan(frame["lon"].to_pylist()[1])
    stored = pa.table({"asset_id": ["A1"], "lon": [9.0], "lat": [9.0]})
    assert with_coordinates(stored, assets, sites) is stored


def test_relative_paths_inside_and_outside_the_config_folder(tmp_path):
    from quakefolio.pipeline.io.relpaths import relative_paths

    base = tmp_path / "project"
    manifest = {"inputs": {"exposure": {"path": str(base / "exposure.csv")},
                           "sources": {"path": str(tmp_path / "shared" / "sources.toml")}},
                "config": {"output": {"folder": str(base / "output")}, "scenario": {"currency": "USD"}},
                "warnings": [f"{base / 'sources.toml'}:29: column 'faults[1].mfd': capped"],
                "units": {"asset_loss": {"eal": "USD/yr"}}, "seed": 7}
    got = relative_paths(manifest, base)
    assert got["inputs"] == {"exposure": {"path": "exposure.csv"}, "sources": {"path": "../shared/sources.toml"}}
    assert got["config"] == {"output": {"folder": "output"}, "scenario": {"currency": "USD"}}
    assert got["warnings"] == ["sources.toml:29: column 'faults[1].mfd': capped"]
    assert got["units"] == manifest["units"] and got["seed"] == 7


def test_site_table_in_ingest_mode_holds_positions_and_assets():
    from quakefolio.pipeline.stages import load_inputs
    from quakefolio.pipeline.stages.sites import hazard_sites_table

    inputs = load_inputs(MINI / "quakefolio.toml")  # reads only; writes nothing
    sites = hazard_sites_table(inputs)
    assert list(sites.columns) == ["site_id", "lon", "lat", "n_assets", "max_asset_distance_km"]
    assert sites.site_id.tolist() == list(inputs.hazard.site_id) and sites.n_assets.sum() == len(inputs.exposure)
    for s in range(len(sites)):  # the farthest asset mapped to each site
        d = inputs.site_distance_km[inputs.site_index == s]
        assert sites.max_asset_distance_km[s] == (d.max() if len(d) else 0.0)
