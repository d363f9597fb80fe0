"""The report explains itself: key figures with what each is and which to quote, exposure and EAL/AAL by
class, largest events, riskiest buildings by EAL and by collapse probability, uniform-hazard spectra as
points, breakdowns by exposure column (``[output] breakdown_columns``, ``breakdown_ep``).

The new numbers are checked against independent computations: sums by class against the per-asset
tables, the breakdown of a column with one group against the portfolio's own PML and TVaR, the
breakdown AAL against the per-asset event-based AAL (another accumulator of the same kernel), the
per-group event losses of the loss kernel against the closed form of the mean loss ratio and against
per-asset sums, and the breakdown PML against the order statistic of rank ceil(N/T) of the grouped year
losses computed here (the empirical quantile; Grossi & Kunreuther 2005, Ch. 2, common practice).
"""
from __future__ import annotations

import base64
import csv
import html
import math
import re
import shutil

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

from quakefolio.core.errors import InputError
from quakefolio.core.events.breakdown import BreakdownSums, LossHooks
from quakefolio.core.events.losses import portfolio_event_losses
from quakefolio.pipeline.io import breakdowns
from quakefolio.pipeline.io.config import load_config
from quakefolio.pipeline.io.ingest import read_exposure
from quakefolio.fragility import load_library
from quakefolio.pipeline.report import SECTIONS, build_report
from quakefolio.pipeline.report.context import ReportRun
from quakefolio.pipeline.report.document import CACHED_SECTIONS
from quakefolio.pipeline.report.figures import _RC, UHS_DENSE_PERIODS, _uhs_figure, uhs_style
from quakefolio.pipeline.report.sections_assets import riskiest
from quakefolio.pipeline.report.sections_summary import TOP_EVENTS, class_summary
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.stages.breakdown import breakdown_ep_table
from quakefolio.pipeline.io.store import read_table

from conftest import MINI, missing_tool
from test_report import PNG_SIGNATURE, _browser, _chromium, _parse, _section

COLUMNS = ["building_class", "district", "whole"]


def _mini_with_columns(dst):
    """The mini inputs with two more exposure columns: ``district`` (two groups) and ``whole`` (one group)."""
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    path = dst / "exposure.csv"
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    rows[0] += ["district", "whole"]
    for i, row in enumerate(rows[1:]):
        row += ["north" if i % 2 else "south", "all"]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    return dst


def _config(dst, name, extra):
    text = (dst / "quakefolio_compute.toml").read_text()
    text = text.replace("report = false  # tests of the report turn it on",
                        f"report = false\nbreakdown_columns = {COLUMNS!r}".replace("'", '"'))
    cfg = dst / name
    cfg.write_text(text + "\n[portfolio]\n" + extra)
    return cfg


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Compute-mode runs of the mini inputs with breakdowns: mean damage ratios and sampled damage."""
    dst = _mini_with_columns(tmp_path_factory.mktemp("explain") / "mini")
    mean = run_pure(_config(dst, "mean.toml", "years = 2000\n"))
    sampled = run_pure(_config(dst, "sampled.toml", 'years = 1000\nloss_model = "sampled_damage"\n'
                                                    "secondary_correlation = 0.3\n"))
    return {"mean": mean, "sampled": sampled, "dir": dst}


@pytest.fixture(scope="module")
def report(runs):
    return build_report(runs["mean"])


# --- structure ---------------------------------------------------------------------------------------

def test_new_sections_are_listed_and_cached():
    ids = [sid for sid, _ in SECTIONS]
    for sid in ("exposure", "events", "breakdowns", "riskiest"):
        assert sid in ids
    assert {"exposure", "events", "breakdowns"} <= CACHED_SECTIONS  # drawn from the tables alone


def test_key_figures_say_what_to_quote(runs, report):
    notes = re.search(r'<details open class="explain" id="key-notes">(.*?)</details>', report, flags=re.S)
    assert notes, "the key figures have no explanation"
    text = html.unescape(re.sub(r"<[^>]+>", " ", notes.group(1)))
    assert "quote this as the portfolio's expected annual loss" in text
    assert "simulation's check on the classical EAL" in text and "basis of PML and TVaR" in text
    assert "EAL), classical [USD/yr]" in text and "AAL), event-based [USD/yr]" in text
    assert "PML [USD]" in text and "TVaR [USD]" in text
    run = ReportRun(runs["mean"])
    tree = run.manifest["hazard_logic_tree"]
    for branch in tree["source_branches"] + tree["gmm_branches"]:
        assert branch["id"] in text  # the branches used are named
    assert "mean damage ratio" in text  # the loss model of this run
    keys = re.search(r'<div class="keys" id="key-figures">(.*?)</div><details', report, flags=re.S).group(1)
    values = [(html.unescape(v), html.unescape(k)) for v, k in re.findall(r"<b>([^<]*)</b><span>([^<]*)</span>", keys)]
    for value, label in values:
        if re.search(r"\b(EAL|AAL)\b", label):
            assert value.endswith("USD/yr"), (value, label)
        if label.startswith(("PML", "TVaR")):
            assert value.endswith(" USD"), (value, label)
    sampled = build_report(runs["sampled"])
    assert "correlation 0.3 within each building class per event" in sampled


def test_every_money_header_has_its_unit(report):
    """No table header or key figure names a money quantity without a currency ([USD] or [USD/yr])."""
    headers = [html.unescape(re.sub(r"<[^>]+>", "", h)) for h in re.findall(r"<th[^>]*>(.*?)</th>", report)]
    money = re.compile(r"\b(EAL|AAL|PML|TVaR|loss|value|standard error|s\.e\.)\b", re.I)
    unitless = [h for h in headers if money.search(h) and "[" not in h and not re.search(r"share|ratio|relative|z$", h)]
    allowed = {"basis", "metric", "relative s.e.",
               "standard error", "TVaR (AEP)"}  # people and time: each row's unit is in its own 'unit' column
    assert not [h for h in unitless if h not in allowed], unitless


# --- exposure and annual loss by class -------------------------------------------------------------------

def test_class_sums_equal_the_portfolio_totals(runs, report):
    run = ReportRun(runs["mean"])
    s = class_summary(run)
    loss = read_table(runs["mean"], "asset_loss")
    ev = read_table(runs["mean"], "asset_event_loss")
    assets = read_table(runs["mean"], "run_assets")
    assert s.n_assets.sum() == len(loss)
    np.testing.assert_allclose(s.replacement_value.sum(), loss.replacement_value.sum(), rtol=1e-12)
    np.testing.assert_allclose(s.eal.sum(), loss.eal.sum(), rtol=1e-12)
    np.testing.assert_allclose(s.aal_ground_up.sum(), ev.aal_ground_up.sum(), rtol=1e-12)
    np.testing.assert_allclose(s.occupants.sum(), assets.occupants.sum(), rtol=1e-12)
    by_class = loss.groupby("building_class").eal.sum()
    np.testing.assert_allclose(s.eal.loc[by_class.index].to_numpy(), by_class.to_numpy(), rtol=1e-12)
    body = _section(report, "exposure")
    rows = re.findall(r"<tr>(.*?)</tr>", body.split("<tbody>")[1])
    assert len(rows) == len(s) + 1 and "all classes" in rows[-1]
    assert "EAL, classical [USD/yr]" in body and "AAL, event-based [USD/yr]" in body


# --- largest events ---------------------------------------------------------------------------------------

def test_top_events_are_the_largest_of_the_event_loss_table(runs, report):
    ev = read_table(runs["mean"], "event_loss")
    body = _section(report, "events")
    rows = re.findall(r"<tr>(.*?)</tr>", body.split("<tbody>")[1])
    assert len(rows) == min(TOP_EVENTS, len(ev))
    first = re.findall(r'data-v="([^"]*)"', rows[0])
    top = ev.loc[ev.ground_up_loss.idxmax()]
    assert int(float(first[0])) == int(top.event_id)
    shown = [float(re.findall(r'data-v="([^"]*)"', r)[-2]) for r in rows]  # ground-up loss column
    assert shown == sorted(shown, reverse=True)
    np.testing.assert_allclose(shown, np.sort(ev.ground_up_loss.to_numpy())[::-1][:len(rows)], rtol=1e-8)
    for label in ("year", "source", "magnitude [Mw]", "ground-up loss [USD]", "net loss [USD]"):
        assert label in body


# --- riskiest buildings ------------------------------------------------------------------------------------

def test_riskiest_rankings():
    loss = pd.DataFrame({"asset_id": ["a", "b", "c", "d"], "eal": [5.0, 9.0, 1.0, 9.0],
                         "collapse_prob_in_horizon": [0.1, 0.02, 0.3, np.nan]})
    by_eal, by_collapse = riskiest(loss, 3)
    assert list(by_eal.asset_id) == ["b", "d", "a"]  # ties by asset id
    assert list(by_collapse.asset_id) == ["c", "a", "b"]  # no collapse probability: left out


def test_riskiest_section_has_two_tables(runs, report):
    body = _section(report, "riskiest")
    assert "By expected annual loss" in body and "By probability of collapse" in body
    assert body.count("<table") == 2
    for label in ("class", "site", "value [USD]", "EAL [USD/yr]", "EAL ratio", "P(collapse in 50 yr)"):
        assert label in body


# --- uniform-hazard spectrum as points --------------------------------------------------------------------

def test_uniform_hazard_spectrum_is_drawn_as_points(runs, report):
    assert uhs_style(3)["linestyle"] == "none"
    assert "linestyle" not in uhs_style(UHS_DENSE_PERIODS) and uhs_style(UHS_DENSE_PERIODS)["linewidth"] < 1
    run = ReportRun(runs["mean"])
    uhs = run.table("hazard_at_return_periods")
    site = sorted(set(uhs.site_id))[0]
    import matplotlib

    with matplotlib.rc_context(_RC):
        fig = _uhs_figure(run, uhs, "mean", [(site, "")])
    lines = fig.axes[0].get_lines()
    assert lines and all(ln.get_linestyle() == "None" and ln.get_marker() == "o" for ln in lines)
    assert "computed periods as points, not joined" in _section(report, "hazard")


# --- breakdowns --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("mode", ["mean", "sampled"])
def test_breakdown_of_one_group_is_the_portfolio(runs, mode):
    """A column with one value groups every building: its AAL, PML and TVaR are the portfolio's."""
    bep = read_table(runs[mode], "breakdown_ep")
    ep = read_table(runs[mode], "portfolio_ep")
    summ = read_table(runs[mode], "portfolio_summary").set_index("basis")
    whole = bep[bep.breakdown_column == "whole"]
    assert set(whole.group) == {"all"}
    for basis in ("ground_up", "net"):
        w = whole[whole.basis == basis].sort_values("return_period_yr")
        p = ep[ep.basis == basis].sort_values("return_period_yr")
        for col in ("aep_loss", "oep_loss", "tvar_loss"):
            np.testing.assert_allclose(w[col].to_numpy(), p[col].to_numpy(), rtol=1e-9, equal_nan=True)
        np.testing.assert_allclose(w.aal.iloc[0], summ.loc[basis, "aal"], rtol=1e-9)


@pytest.mark.parametrize("mode", ["mean", "sampled"])
def test_breakdown_aal_equals_the_per_asset_aal_by_group(runs, mode):
    bep = read_table(runs[mode], "breakdown_ep")
    ev = read_table(runs[mode], "asset_event_loss")
    assets = read_table(runs[mode], "run_assets")
    assert set(COLUMNS) <= set(assets.columns)  # the named columns are kept with the run's assets
    for col in COLUMNS:
        for basis, aal_col in (("ground_up", "aal_ground_up"), ("net", "aal_net")):
            direct = ev[aal_col].groupby(assets[col].to_numpy()).sum()
            got = bep[(bep.breakdown_column == col) & (bep.basis == basis)].drop_duplicates("group").set_index(
                "group").aal
            np.testing.assert_allclose(got.loc[direct.index].to_numpy(), direct.to_numpy(), rtol=1e-9)
            counts = assets[col].value_counts()
            n = bep[(bep.breakdown_column == col)].drop_duplicates("group").set_index("group").n_assets
            assert (n.loc[counts.index].to_numpy() == counts.to_numpy()).all()


def test_breakdown_section_shows_every_group(runs, report):
    body = _section(report, "breakdowns")
    for col in ("building class", "district", "whole"):
        assert f"<h3>By {col}</h3>" in body
    assets = read_table(runs["mean"], "run_assets")
    for value in set(assets.district) | set(assets.building_class):
        assert f">{value}<" in body
    assert "PML 100 yr [USD]" in body and "AAL net [USD/yr]" in body


def _direct_pml(year_losses, rp):
    """The loss of rank ceil(N/T) among N year losses, largest first (NaN for T > N)."""
    n = len(year_losses)
    if rp > n:
        return float("nan")
    return float(np.sort(year_losses)[::-1][math.ceil(n / rp) - 1])


def test_breakdown_pml_is_the_quantile_of_grouped_year_losses():
    rng = np.random.default_rng(7)
    n_years, n_events, n_groups = 400, 900, 3
    year = np.sort(rng.integers(1, n_years + 1, n_events))
    loss = rng.lognormal(10, 2, size=(n_events, n_groups)) * (rng.random((n_events, n_groups)) < 0.4)
    breakdown = (("district", ("a", "b", "c"), np.array([0, 1, 2, 2])),)
    parts = [((loss[:500],), (0.5 * loss[:500],)), ((loss[500:],), (0.5 * loss[500:],))]  # two chunks
    rps = np.array([10.0, 50.0, 200.0, 1000.0])
    table = breakdown_ep_table(breakdown, parts, year, n_years, rps)
    for g, name in enumerate("abc"):
        agg = np.zeros(n_years)
        occ = np.zeros(n_years)
        for e in range(n_events):
            agg[year[e] - 1] += loss[e, g]
            occ[year[e] - 1] = max(occ[year[e] - 1], loss[e, g])
        got = table[(table.group == name) & (table.basis == "ground_up")].set_index("return_period_yr")
        for rp in rps:
            np.testing.assert_allclose(got.aep_loss.loc[rp], _direct_pml(agg, rp), rtol=1e-12, equal_nan=True)
            np.testing.assert_allclose(got.oep_loss.loc[rp], _direct_pml(occ, rp), rtol=1e-12, equal_nan=True)
        np.testing.assert_allclose(got.aal.iloc[0], agg.sum() / n_years, rtol=1e-12)
        net = table[(table.group == name) & (table.basis == "net")].set_index("return_period_yr")
        np.testing.assert_allclose(net.aep_loss.loc[10.0], 0.5 * _direct_pml(agg, 10.0), rtol=1e-12)
    assert list(table[table.basis == "ground_up"].drop_duplicates("group").n_assets) == [1, 1, 2]


def _kernel_case(loss_model):
    """A small portfolio of two classes on three sites, its intensities, and the kernel's breakdown sums."""
    rng = np.random.default_rng(11)
    n_ev, n_sites = 300, 3
    im = rng.lognormal(np.log(0.2), 0.8, size=(n_ev, 1, n_sites))
    medians, betas = np.array([0.1, 0.3, 0.8]), np.array([0.5, 0.5, 0.5])
    mdr, cov = np.array([0.05, 0.3, 1.0]), np.array([0.4, 0.3, 0.0])
    value = np.array([1e6, 2e6, 5e5, 3e6, 8e5])
    deductible = np.array([np.nan, 5e4, np.nan, np.nan, 2e4])
    limit = np.array([np.nan, 1.5e6, np.nan, np.nan, 6e5])
    asset_site = np.array([0, 1, 2, 0, 2])
    classes = []
    for assets in (np.array([0, 1, 2]), np.array([3, 4])):
        usites, pair = np.unique(asset_site[assets], return_inverse=True)
        classes.append((assets, 0, medians, betas, mdr, cov, usites, pair.ravel()))
    groups = [(np.array([0, 1, 0, 1, 1]), 2), (np.arange(5), 5)]  # a two-group column, one group per asset
    sums = BreakdownSums(groups, n_ev)
    blocks = [(0, 0, 256), (1, 256, n_ev)]
    out = portfolio_event_losses(im, classes, value, deductible, limit, loss_model=loss_model, seed=5, blocks=blocks,
                                 group=np.zeros(5, dtype=np.int64), group_sums=LossHooks(None, sums))
    return im, (medians, mdr, value, asset_site), sums, out


@pytest.mark.parametrize("loss_model", ["mean_damage_ratio", "sampled_damage"])
def test_kernel_group_sums_add_up(loss_model):
    _, _, sums, (gu_ev, net_ev, asset_sum, _, _) = _kernel_case(loss_model)
    (gu2, gu_asset), (net2, net_asset) = sums.result()
    for total, by_group, per_asset in ((gu_ev, gu2, gu_asset), (net_ev, net2, net_asset)):
        np.testing.assert_allclose(by_group.sum(axis=1), total, rtol=1e-12, atol=1e-6)
        np.testing.assert_allclose(per_asset[:, [0, 2]].sum(axis=1), by_group[:, 0], rtol=1e-12, atol=1e-6)
    np.testing.assert_allclose(gu_asset.sum(axis=0), asset_sum.sum(axis=0)[0], rtol=1e-12)
    np.testing.assert_allclose(net_asset.sum(axis=0), asset_sum.sum(axis=0)[1], rtol=1e-12)
    assert (net_asset <= gu_asset + 1e-9).all()


def test_kernel_ground_up_by_asset_is_the_mean_loss_ratio():
    """Mean mode: each asset's event loss is V sum_j (mu_j - mu_{j-1}) Phi(ln(x / theta_j) / beta_j)."""
    im, (medians, mdr, value, asset_site), sums, _ = _kernel_case("mean_damage_ratio")
    x = im[:, 0, asset_site]  # (n_ev, n_assets)
    p = norm.cdf(np.log(x[..., None] / medians) / 0.5)
    expected = value * (p * np.diff(mdr, prepend=0.0)).sum(axis=-1)
    np.testing.assert_allclose(sums.result()[0][1], expected, rtol=1e-10)


# --- the key is checked ---------------------------------------------------------------------------------------

def test_breakdown_column_with_too_many_groups_is_located(tmp_path, monkeypatch):
    dst = _mini_with_columns(tmp_path / "mini")
    cfg = _config(dst, "many.toml", "years = 10\n")
    monkeypatch.setattr(breakdowns, "MAX_BREAKDOWN_GROUPS", 2)
    config = load_config(cfg)
    exposure = read_exposure(config.exposure.file, load_library(config.fragility.library), keep=COLUMNS)
    with pytest.raises(InputError) as info:
        breakdowns.check_breakdown_columns(config, exposure)
    err = info.value
    line = cfg.read_text().splitlines().index(next(ln for ln in cfg.read_text().splitlines()
                                                   if ln.startswith("breakdown_columns"))) + 1
    assert str(err.path) == str(cfg) and err.row == line and err.column == "output.breakdown_columns"
    assert "'building_class'" in str(err) and "3 distinct values" in str(err)


# --- headless browser ------------------------------------------------------------------------------------------

_PROBE = ("<script>window.addEventListener('load',function(){"
          "var imgs=document.querySelectorAll('img'),ok=0;"
          "for(var i=0;i<imgs.length;i++){if(imgs[i].complete&&imgs[i].naturalWidth>0)ok++;}"
          "var b=document.body;b.setAttribute('data-images',imgs.length);b.setAttribute('data-decoded',ok);"
          "['exposure','events','breakdowns','riskiest'].forEach(function(id){var s=document.getElementById(id);"
          "b.setAttribute('data-rows-'+id,s?s.querySelectorAll('tbody tr').length:-1);"
          "b.setAttribute('data-h-'+id,s?s.querySelector('h2').getBoundingClientRect().height:-1);});"
          "var k=document.getElementById('key-notes');"
          "b.setAttribute('data-notes',k?k.querySelectorAll('li').length:-1);"
          "b.setAttribute('data-notes-h',k?k.getBoundingClientRect().height:-1);});</script>")


def test_report_explains_itself_in_headless_chromium(runs, report, tmp_path):
    binary = _chromium()
    if binary is None:
        missing_tool("no Chromium binary (chromium, chromium-browser, google-chrome) on PATH")
    page = tmp_path / "report.html"
    page.write_text(report.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    done = _browser(binary, tmp_path, "--dump-dom", page.as_uri())
    if done.returncode != 0 and not done.stdout.strip():
        missing_tool(f"Chromium did not run: {done.stderr.strip().splitlines()[-1:]}")
    dom = _parse(done.stdout)
    assert dom.sections == [sid for sid, _ in SECTIONS]
    body = dict(next(a for t, a in dom.tags if t == "body"))
    n_images = int(body["data-images"])
    assert n_images == len(_parse(report).images()) and int(body["data-decoded"]) == n_images  # every PNG decoded
    for img in dom.images():
        assert base64.b64decode(img["src"].split(",", 1)[1]).startswith(PNG_SIGNATURE)
    classes = read_table(runs["mean"], "asset_loss").building_class.nunique()
    events = len(read_table(runs["mean"], "event_loss"))
    n_assets = len(read_table(runs["mean"], "asset_loss"))
    assert int(body["data-rows-exposure"]) == classes + 1
    assert int(body["data-rows-events"]) == min(TOP_EVENTS, events)
    assert int(body["data-rows-riskiest"]) == 2 * n_assets  # both rankings list every mini building
    assert int(body["data-rows-breakdowns"]) == classes + 2 + 1  # classes, two districts, one whole
    assert int(body["data-notes"]) >= 5 and float(body["data-notes-h"]) > 0  # the explanations are laid out
    for sid in ("exposure", "events", "breakdowns", "riskiest"):
        assert float(body[f"data-h-{sid}"]) > 0
    text = " ".join(dom.texts)
    for heading in ("Exposure and annual loss by building class", "The largest simulated events",
                    "Breakdowns by exposure column", "The riskiest buildings", "By expected annual loss",
                    "By probability of collapse", "What these figures are and which to quote"):
        assert heading in text


def test_breakdown_without_event_stage_shows_eal_by_group(tmp_path):
    """Tabulated hazard (no event stage): the breakdown holds the classical EAL of every group, summing to the total."""
    dst = _mini_with_columns(tmp_path / "mini")
    cfg = dst / "quakefolio.toml"
    cfg.write_text(cfg.read_text().replace("report = false  # tests of the report turn it on",
                                           'report = false\nbreakdown_columns = ["district"]'))
    run = run_pure(cfg)
    assert not (run / "breakdown_ep.parquet").exists()
    body = _section(build_report(run), "breakdowns")
    assert "No event-based stage: no AAL or PML by group." in body and "<h3>By district</h3>" in body
    loss, assets = read_table(run, "asset_loss"), read_table(run, "run_assets")
    direct = loss.eal.groupby(assets.district.to_numpy()).sum()
    shown = {m[0]: float(m[1]) for m in re.findall(r"<tr><td>(\w+)</td>(?:<td[^>]*>[^<]*</td>){2}"
                                                   r'<td class=n data-v="([^"]+)">', body)}
    assert set(shown) == set(direct.index)
    np.testing.assert_allclose([shown[k] for k in direct.index], direct.to_numpy(), rtol=1e-8)


def test_breakdown_memory_counts_in_the_size_check():
    """16 bytes per event and group (ground-up and net) and 32 per year and group of the largest column."""
    from types import SimpleNamespace

    from quakefolio.pipeline.stages.sizes import _breakdown_term

    exposure = pd.DataFrame({"district": ["a", "b", "c", "a"], "account": ["x", "x", "y", "y"]})
    inputs = SimpleNamespace(config=SimpleNamespace(output=SimpleNamespace(breakdown_columns=("district", "account"))),
                             exposure=exposure)
    term = _breakdown_term(inputs, years=1000, events=5000.0)
    assert term.bytes == 16.0 * 5000 * (3 + 2) + 32.0 * 1000 * 3 and term.key == "output.breakdown_columns"
    none = SimpleNamespace(config=SimpleNamespace(output=SimpleNamespace(breakdown_columns=())), exposure=exposure)
    assert _breakdown_term(none, years=1000, events=5000.0).bytes == 0
