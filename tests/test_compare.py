"""Change report between two runs (quakefolio compare): attribution, tables, atomic writing, CLI."""
import hashlib
import json
import os
import shutil
import subprocess
import sys

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.errors import InputError
from quakefolio.pipeline import compare
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.compare import compare_runs, resolve_run, write_change_report
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import read_table, table_metadata, to_arrow

REPORT_FILES = {"change_assets.parquet", "change_asset_damage.parquet", "change_portfolio.parquet",
                "change_causes.json"}


# --- helpers ---------------------------------------------------------------------------------------

def _replace(path, old, new):
    text = path.read_text()
    assert text.count(old) == 1, f"{old!r} must occur once in {path.name}"
    path.write_text(text.replace(old, new))


def _scale_curve(path, site, im, factor):
    """Multiply the annual rates of one site's curve for one IM in the tabulated hazard CSV."""
    lines = path.read_text().splitlines()
    head = lines[0].split(",")
    i_site, i_im, i_rate = head.index("site_id"), head.index("im"), head.index("annual_rate")
    out, n = [lines[0]], 0
    for line in lines[1:]:
        cells = line.split(",")
        if cells[i_site] == site and cells[i_im] == im:
            cells[i_rate] = repr(float(cells[i_rate]) * factor)
            n += 1
        out.append(",".join(cells))
    assert n > 0
    path.write_text("\n".join(out) + "\n")


def _two_runs(config, edit=None):
    """Run the mini inputs, apply ``edit(folder)``, run again; return (run_a, run_b)."""
    run_a = run_pure(config)
    if edit is not None:
        edit(config.parent)
    run_b = run_pure(config)
    return run_a, run_b


def _assets(result):
    return result["change_assets"].set_index("asset_id")


def _snapshot(folder):
    """sha256 and mtime of every file below ``folder``."""
    out = {}
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(folder))] = (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
    return out


# --- attribution -----------------------------------------------------------------------------------

def test_identical_inputs_change_nothing(mini_config):
    # settings that act on no per-asset result are listed but are no cause
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "quakefolio.toml", "[output]\n",
                                                             "[output]\ntop_assets = 3\n"))
    res = compare_runs(run_a, run_b)
    assets = res["change_assets"]
    assert len(assets) == 5 and set(assets.status) == {"kept"}
    assert set(assets.primary_cause) == {"unchanged"} and not assets.results_changed.any()
    assert not assets[[f"cause_{c}" for c in compare.CAUSES]].to_numpy().any()
    assert (assets.causes == "").all()
    assert (assets.eal_change == 0).all() and (assets.collapse_prob_in_horizon_change == 0).all()
    dmg = res["change_asset_damage"]
    assert len(dmg) == 12 and (dmg.annual_rate_exceed_change == 0).all()
    port = res["change_portfolio"].set_index("metric")
    assert port.loc["eal", "change"] == 0 and port.loc["n_assets", "value_b"] == 5
    causes = res["change_causes"]
    assert causes["inputs_changed"] == ["config"] and causes["settings_changed"] == []
    assert causes["hazard"]["sites_changed"] == [] and causes["fragility"]["classes_changed"] == []
    assert causes["assets"]["by_primary_cause"] == {"unchanged": 5}
    # a run against itself, too
    same = compare_runs(run_b, run_b)
    assert set(same["change_assets"].primary_cause) == {"unchanged"}
    assert same["change_causes"]["inputs_changed"] == []


def test_hazard_change_at_one_site_moves_only_its_assets(mini_config):
    # B3 (TST-B, PGA) is the only asset on site T03
    run_a, run_b = _two_runs(mini_config, lambda d: _scale_curve(d / "hazard_curves.csv", "T03", "PGA", 1.5))
    res = compare_runs(run_a, run_b)
    assets = _assets(res)
    assert assets.index[assets.results_changed].tolist() == ["B3"]
    assert assets.index[assets.cause_hazard].tolist() == ["B3"]
    assert assets.loc["B3", "primary_cause"] == "hazard" and assets.loc["B3", "causes"] == "hazard"
    assert set(assets.drop("B3").primary_cause) == {"unchanged"}
    # the damage-state integral is linear in the hazard curve: every rate and the EAL scale by 1.5
    dmg = res["change_asset_damage"]
    b3 = dmg[dmg.asset_id == "B3"]
    assert_allclose(b3.annual_rate_exceed_relative_change, 0.5, rtol=1e-12)
    assert_allclose(assets.loc["B3", "eal_relative_change"], 0.5, rtol=1e-12)
    assert (dmg[dmg.asset_id != "B3"].annual_rate_exceed_change == 0).all()
    causes = res["change_causes"]
    assert causes["inputs_changed"] == ["hazard_curves"]
    assert causes["hazard"]["sites_changed"] == ["T03"] and causes["hazard"]["curves_changed_by_im"] == {"PGA": 1}
    port = res["change_portfolio"].set_index("metric")
    assert_allclose(port.loc["eal", "change"], assets.loc["B3", "eal_change"], rtol=1e-12)


def test_hazard_change_reaches_a_class_on_an_interpolated_period(mini_config):
    # B5 (TST-C, SA_0.6) reads SA_0.3 and SA_1.0 at T01; B1 (TST-A, SA_0.3) shares the site
    run_a, run_b = _two_runs(mini_config, lambda d: _scale_curve(d / "hazard_curves.csv", "T01", "SA_1.0", 1.3))
    assets = _assets(compare_runs(run_a, run_b))
    assert assets.index[assets.results_changed].tolist() == ["B5"]
    assert assets.index[assets.cause_hazard].tolist() == ["B5"]
    assert assets.loc["B1", "primary_cause"] == "unchanged"


def test_ims_used_for_an_interpolated_period():
    tab = {"PGA", "SA_0.3", "SA_1.0"}
    assert compare.diff._ims_used("SA_0.6", tab) == ["SA_0.3", "SA_1.0"]
    assert compare.diff._ims_used("SA_0.3", tab) == ["SA_0.3"]
    assert compare.diff._ims_used("SA_3.0", tab) == sorted(tab)  # cannot be bracketed: every curve counts


def test_fragility_change_moves_only_that_class(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "fragility.toml", "median = 0.2\n",
                                                             "median = 0.25\n"))
    res = compare_runs(run_a, run_b)
    assets = _assets(res)
    tst_a = ["B1", "B2"]
    assert assets.index[assets.results_changed].tolist() == tst_a
    assert assets.index[assets.cause_fragility].tolist() == tst_a
    assert (assets.loc[tst_a, "primary_cause"] == "fragility").all()
    assert not assets.cause_hazard.any() and not assets.cause_exposure.any()
    assert set(assets.drop(tst_a).primary_cause) == {"unchanged"}
    assert (assets.loc[tst_a, "eal_change"] < 0).all()  # a higher median: less damage
    assert res["change_causes"]["fragility"]["classes_changed"] == ["TST-A"]
    assert res["change_causes"]["inputs_changed"] == ["fragility_library"]


def test_replacement_value_change_is_exposure_and_scales_eal_exactly(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "exposure.csv", "TST-A,2500000,", "TST-A,3000000,"))
    res = compare_runs(run_a, run_b)
    assets = _assets(res)
    b2 = assets.loc["B2"]
    assert assets.index[assets.results_changed].tolist() == ["B2"]
    assert b2.primary_cause == "exposure" and b2.causes == "exposure"
    assert not b2.cause_hazard and not b2.cause_fragility and not b2.cause_settings
    assert_allclose(b2.eal_b / b2.eal_a, 3000000 / 2500000, rtol=1e-12)
    assert b2.eal_change_from_ratio == 0
    assert_allclose(b2.eal_change_from_value, b2.eal_change, rtol=1e-12)
    dmg = res["change_asset_damage"]
    assert (dmg.annual_rate_exceed_change == 0).all()  # damage does not depend on value
    assert set(assets.drop("B2").primary_cause) == {"unchanged"}
    port = res["change_portfolio"].set_index("metric")
    assert port.loc["total_replacement_value", "change"] == 500000


def test_added_and_removed_assets(mini_config):
    def edit(d):
        _replace(d / "exposure.csv", "B4,10.031,19.999,TST-B,1200000,500,0,,\n",
                 "B6,10.002,20.028,TST-A,700000,,3,,\n")
    run_a, run_b = _two_runs(mini_config, edit)
    res = compare_runs(run_a, run_b)
    assets = _assets(res)
    assert assets.loc["B4", "status"] == "removed" and assets.loc["B6", "status"] == "added"
    assert list(assets.index) == ["B1", "B2", "B3", "B6", "B5", "B4"]  # B's order, then removed ones
    for aid in ("B4", "B6"):
        assert assets.loc[aid, "primary_cause"] == "exposure" and assets.loc[aid, "cause_exposure"]
        assert assets.loc[aid, "results_changed"]
    assert assets.loc["B4", "eal_change"] == -assets.loc["B4", "eal_a"] and np.isnan(assets.loc["B4", "eal_b"])
    assert assets.loc["B6", "eal_change"] == assets.loc["B6", "eal_b"] and assets.loc["B6", "building_class_a"] is None
    assert set(assets.drop(["B4", "B6"]).primary_cause) == {"unchanged"}
    dmg = res["change_asset_damage"]
    assert dmg[dmg.asset_id == "B6"].annual_rate_exceed_a.isna().all()
    port = res["change_portfolio"].set_index("metric")
    assert_allclose(port.loc["eal", "change"], assets.loc["B6", "eal_b"] - assets.loc["B4", "eal_a"], rtol=1e-12)
    causes = res["change_causes"]
    assert causes["assets"]["added"] == 1 and causes["assets"]["removed"] == 1
    assert any("1 assets added, 1 removed" in n for n in causes["notes"])
    # written as Arrow nulls, not as text
    table = pq.read_table(write_change_report(run_a, run_b) / "change_assets.parquet")
    assert table.column("building_class_a").null_count == 1


def test_class_change_of_an_asset_is_exposure(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "exposure.csv", "20.001,TST-A,", "20.001,TST-B,"))
    assets = _assets(compare_runs(run_a, run_b))
    assert assets.loc["B1", "causes"] == "exposure" and assets.loc["B1", "results_changed"]
    assert set(assets.drop("B1").primary_cause) == {"unchanged"}


def test_horizon_change_is_a_setting(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "quakefolio.toml", "horizon_yr = 50",
                                                             "horizon_yr = 100"))
    res = compare_runs(run_a, run_b)
    assets = res["change_assets"]
    assert assets.results_changed.all() and assets.cause_settings.all()
    assert set(assets.primary_cause) == {"settings"} and set(assets.causes) == {"settings"}
    assert (assets.eal_change == 0).all() and (assets.collapse_prob_in_horizon_change > 0).all()
    dmg = res["change_asset_damage"]
    assert (dmg.annual_rate_exceed_change == 0).all() and (dmg.prob_exceed_in_horizon_change >= 0).all()
    assert res["change_causes"]["settings_changed"] == [
        {"setting": "scenario.horizon_yr", "a": 50.0, "b": 100.0, "scope": "assets"}]


def test_tail_policy_change_is_a_setting(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "quakefolio.toml", "[fragility]\n",
                                                             "[fragility]\ntail = \"truncate\"\n"))
    res = compare_runs(run_a, run_b)
    assets = res["change_assets"]
    assert assets.cause_settings.all() and not assets.cause_hazard.any()
    assert set(assets.primary_cause[assets.results_changed]) == {"settings"}
    assert [s["setting"] for s in res["change_causes"]["settings_changed"]] == ["fragility.tail"]


def test_several_causes_are_ordered(mini_config):
    # B2: value up 4x and hazard at T02 up 1.1x: the value part of the EAL change leads
    def edit(d):
        _replace(d / "exposure.csv", "TST-A,2500000,", "TST-A,10000000,")
        _scale_curve(d / "hazard_curves.csv", "T02", "SA_0.3", 1.1)
    run_a, run_b = _two_runs(mini_config, edit)
    assets = _assets(compare_runs(run_a, run_b))
    b2 = assets.loc["B2"]
    assert b2.causes == "exposure,hazard" and b2.primary_cause == "exposure"
    assert_allclose(b2.eal_change_from_value + b2.eal_change_from_ratio, b2.eal_change, rtol=1e-12)
    assert assets.loc["B4", "primary_cause"] == "unchanged"  # TST-B on T02 reads PGA, not SA_0.3


# --- event-based portfolio tables ------------------------------------------------------------------

def _with_event_tables(run, dst, aal, se, scale):
    """A copy of ``run`` (in a separate output folder) with invented event-based tables added."""
    out = dst / "runs" / run.name
    shutil.copytree(run, out)
    (dst / "LATEST").write_text(run.name + "\n")
    prov = {"run_id": run.name}
    summary = pd.DataFrame({"basis": ["ground_up", "net"], "aal": [aal, 0.8 * aal],
                            "aal_standard_error": [se, 0.8 * se]})
    ep = pd.DataFrame({"return_period_yr": [100.0, 250.0, 100.0, 250.0],
                       "aep_loss": np.array([1e6, 2e6, 8e5, 1.6e6]) * scale,
                       "oep_loss": np.array([9e5, 1.8e6, 7e5, 1.4e6]) * scale,
                       "tvar_loss": np.array([1.5e6, 2.5e6, 1.2e6, 2e6]) * scale,
                       "basis": ["ground_up", "ground_up", "net", "net"]})
    for name, frame in (("portfolio_summary", summary), ("portfolio_ep", ep)):
        pq.write_table(to_arrow(frame, name=name, units={}, description="", provenance=prov), out / f"{name}.parquet")
    return out


def test_event_based_changes_against_standard_error(mini_config, tmp_path):
    run = run_pure(mini_config)
    run_a = _with_event_tables(run, tmp_path / "a", aal=100_000.0, se=2_000.0, scale=1.0)
    run_b = _with_event_tables(run, tmp_path / "b", aal=101_000.0, se=2_000.0, scale=1.1)
    port = compare_runs(run_a, run_b)["change_portfolio"]
    aal = port[port.metric == "aal"].set_index("basis")
    assert_allclose(aal.loc["ground_up", "combined_standard_error"], np.hypot(2000, 2000), rtol=1e-12)
    assert aal.loc["ground_up", "versus_standard_error"] == "within"  # 1000 < 2828
    pml = port[(port.metric == "pml_aep") & (port.basis == "ground_up")].set_index("return_period_yr")
    assert_allclose(pml.loc[250.0, "change"], 2e5, rtol=1e-12)
    assert set(port.metric) == {"n_assets", "total_replacement_value", "eal", "aal", "pml_aep", "pml_oep", "tvar"}
    assert len(port[port.metric == "tvar"]) == 4
    run_c = _with_event_tables(run, tmp_path / "c", aal=120_000.0, se=2_000.0, scale=1.0)
    aal = compare_runs(run_a, run_c)["change_portfolio"].query("metric == 'aal'").set_index("basis")
    assert aal.loc["ground_up", "versus_standard_error"] == "exceeds"
    # only one run with event-based tables: the classical part only, and a note
    res = compare_runs(run, run_b)
    assert set(res["change_portfolio"].metric) == {"n_assets", "total_replacement_value", "eal"}
    assert any("only in run B" in n for n in res["change_causes"]["notes"])
    text = compare.change_summary_text(compare_runs(run_a, run_b), top_n=3)
    assert "AAL (ground_up)" in text and "PML AEP" in text


def test_event_based_runs_with_another_seed(mini_config):
    compute = mini_config.parent / "quakefolio_compute.toml"

    def edit(d):
        with open(compute, "a") as fh:
            fh.write("\n[portfolio]\nseed = 7\n")
    run_a, run_b = _two_runs(compute, edit)
    res = compare_runs(run_a, run_b)
    assert set(res["change_assets"].primary_cause) == {"unchanged"}  # the seed acts on the simulation only
    causes = res["change_causes"]
    assert causes["settings_changed"] == [{"setting": "portfolio.seed", "a": 20261201, "b": 7,
                                           "scope": "event_based"}]
    ev = causes["event_based"]
    assert ev["in_a"] and ev["in_b"] and ev["seed_changed"] and not ev["years_changed"]
    port = res["change_portfolio"]
    aal = port[port.metric == "aal"].set_index("basis")
    assert set(aal.index) == {"ground_up", "net"} and (aal.combined_standard_error > 0).all()
    assert set(aal.versus_standard_error) <= {"within", "exceeds"}
    summary = read_table(run_a, "portfolio_summary").set_index("basis")
    assert_allclose(aal.value_a, summary.loc[aal.index, "aal"], rtol=1e-12)
    n_rp = read_table(run_a, "portfolio_ep").return_period_yr.nunique()
    assert (port.metric.value_counts()[["pml_aep", "pml_oep", "tvar"]] == 2 * n_rp).all()
    assert_allclose(port.query("metric == 'eal'").change, 0.0, atol=0)
    assert not any("share random draws" in n for n in causes["notes"])
    assert any("share random draws" in n for n in compare_runs(run_b, run_b)["change_causes"]["notes"])


# --- writing ---------------------------------------------------------------------------------------

def test_report_is_written_atomically_and_runs_stay_untouched(mini_config, monkeypatch):
    run_a, run_b = _two_runs(mini_config, lambda d: _scale_curve(d / "hazard_curves.csv", "T03", "PGA", 1.5))
    output = run_b.parent.parent
    before = {r: _snapshot(r) for r in (run_a, run_b)}
    latest = (output / "LATEST").read_text()
    folder = write_change_report(run_a, output)  # the output folder stands for its LATEST run
    assert folder == output / "comparisons" / f"{run_a.name}__{run_b.name}"
    assert {p.name for p in folder.iterdir()} == REPORT_FILES
    assert [p.name for p in folder.parent.iterdir()] == [folder.name]  # no partial left
    meta = table_metadata(folder, "change_assets")
    assert meta["run_a"] == run_a.name and meta["run_b"] == run_b.name and meta["units"]["eal_a"] == "USD/yr"
    assert meta["caution"] == CAUTION
    assert pq.read_schema(folder / "change_assets.parquet").field("asset_id").type == "string"
    assert read_table(folder, "change_assets").primary_cause.tolist().count("hazard") == 1
    causes = json.loads((folder / "change_causes.json").read_text())
    assert causes["run_b"]["run_id"] == run_b.name and causes["inputs_changed"] == ["hazard_curves"]

    # a failure half-way leaves the earlier report as it was and nothing partial
    earlier = _snapshot(folder)
    calls = {"n": 0}
    real = compare.render.pq.write_table

    def failing(*args, **kwargs):
        calls["n"] += 1
        if calls["n"] == 2:
            raise OSError("disk full (simulated)")
        return real(*args, **kwargs)

    monkeypatch.setattr(compare.render.pq, "write_table", failing)
    with pytest.raises(OSError, match="simulated"):
        write_change_report(run_a, run_b)
    monkeypatch.undo()
    assert _snapshot(folder) == earlier
    assert [p.name for p in folder.parent.iterdir()] == [folder.name]

    # rerunning replaces the report whole
    assert write_change_report(run_a, run_b) == folder
    assert {p.name for p in folder.iterdir()} == REPORT_FILES
    assert {r: _snapshot(r) for r in (run_a, run_b)} == before
    assert (output / "LATEST").read_text() == latest


def test_report_elsewhere_and_never_inside_a_run(mini_config, tmp_path):
    run_a, run_b = _two_runs(mini_config)
    folder = write_change_report(run_a, run_b, out_dir=tmp_path / "reports")
    assert folder.parent == (tmp_path / "reports").resolve() and {p.name for p in folder.iterdir()} == REPORT_FILES
    with pytest.raises(InputError, match="inside run folder"):
        write_change_report(run_a, run_b, out_dir=run_a / "sub")


def test_run_arguments_are_resolved_or_rejected(mini_config, tmp_path):
    run = run_pure(mini_config)
    assert resolve_run(run.parent.parent) == run == resolve_run(run)
    with pytest.raises(InputError, match="no such run folder"):
        resolve_run(tmp_path / "nowhere")
    (tmp_path / "empty").mkdir()
    with pytest.raises(InputError, match="not a run folder .*nor an output folder"):
        resolve_run(tmp_path / "empty")
    broken = tmp_path / "broken"
    shutil.copytree(run, broken)
    (broken / "manifest.json").write_text("{ not json")
    with pytest.raises(InputError, match="manifest.json:1: not a readable run manifest"):
        compare_runs(broken, run)
    gone = tmp_path / "gone"
    (gone / "runs").mkdir(parents=True)
    (gone / "LATEST").write_text("20000101T000000Z-deadbeef\n")
    with pytest.raises(InputError, match="LATEST: names run '20000101T000000Z-deadbeef'"):
        resolve_run(gone)
    hazard_only = run_pure(mini_config, stages_to_run="hazard")
    with pytest.raises(InputError, match="hazard results only"):
        compare_runs(run, hazard_only)
    no_table = tmp_path / "no_table"
    shutil.copytree(run, no_table)
    os.remove(no_table / "asset_damage.parquet")
    with pytest.raises(InputError, match="missing table: .*asset_damage.parquet"):
        compare_runs(run, no_table)
    (no_table / "asset_damage.parquet").write_bytes(b"not parquet")
    with pytest.raises(InputError, match="asset_damage.parquet: unreadable table"):
        compare_runs(run, no_table)


def test_different_scenarios_are_compared_and_said_so(mini_config):
    run_a, run_b = _two_runs(mini_config, lambda d: _replace(d / "quakefolio.toml", 'name = "pipeline test"',
                                                             'name = "other portfolio"'))
    res = compare_runs(run_a, run_b)
    assert not res["change_causes"]["same_scenario"]
    assert any("different scenarios" in n for n in res["change_causes"]["notes"])
    assert set(res["change_assets"].primary_cause) == {"unchanged"}


# --- command line ----------------------------------------------------------------------------------

def test_cli_compare_prints_the_change_report(mini_config, capsys):
    run_a, run_b = _two_runs(mini_config, lambda d: _scale_curve(d / "hazard_curves.csv", "T03", "PGA", 1.5))
    assert main(["compare", str(run_a), str(run_b), "--top", "3"]) == 0
    out = capsys.readouterr().out
    lines = out.splitlines()
    assert lines[0] == CAUTION
    assert "input files changed: hazard_curves" in out
    assert "hazard curves changed at 1 of 3 sites" in out
    assert "portfolio EAL (classical)  149,985 -> " in out and "+2.55%" in out
    assert "by primary cause: unchanged 4, hazard 1" in out
    row = next(line for line in lines if line.strip().startswith("B3"))
    assert row.split()[-1] == "hazard"
    folder = run_b.parent.parent / "comparisons" / f"{run_a.name}__{run_b.name}"
    assert lines[-1].strip() == f"change report: {folder}"


def test_cli_compare_user_errors_exit_2(mini_config, tmp_path, capsys):
    run = run_pure(mini_config)
    assert main(["compare", str(tmp_path / "nowhere"), str(run)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and "no such run folder" in err and len(err.strip().splitlines()) == 1
    (tmp_path / "empty").mkdir()
    assert main(["compare", str(run), str(tmp_path / "empty")]) == 2
    assert "not a run folder" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["compare", str(run), str(run), "--top", "-1"])
    assert exc.value.code == 2


def test_cli_compare_does_not_import_prefect(mini_config):
    run = run_pure(mini_config)
    code = ("import sys; from quakefolio.pipeline.cli import main; rc = main(['compare', sys.argv[1], sys.argv[1]]); "
            "assert rc == 0, rc; assert 'prefect' not in sys.modules, 'prefect imported'")
    proc = subprocess.run([sys.executable, "-c", code, str(run)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith(CAUTION)
