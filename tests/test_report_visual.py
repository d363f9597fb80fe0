"""The report's visual items: the map with faults, hazard sites and the portfolio outline behind a colouring
toggle; the readable what-if (plain money, labels, verdict, per-building benefit-cost, retrofit fragility);
screening tiers; the trend across the output folder's runs.  Rendered in headless Chromium where it is
installed, and every new number checked against an independent computation."""
import base64
import html
import json
import re
import shutil

import numpy as np
import pandas as pd
import pytest

from quakefolio.fragility import load_library
from quakefolio.pipeline.history import run_history
from quakefolio.pipeline.io.run_inputs import library_from_frame
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.report import build_report
from quakefolio.pipeline.report import sections_assets
from quakefolio.pipeline.report.context import ReportRun
from quakefolio.pipeline.report.figures import _RC, map_cells
from quakefolio.pipeline.report.figures_map import map_figure, portfolio_outline
from quakefolio.pipeline.report.sections_retrofit import TIERS, metric_label, screening_tiers
from quakefolio.pipeline.report.sections_trend import trend_frame
from quakefolio.pipeline.runner import run_pure

from conftest import MINI
from test_report import PNG_SIGNATURE, _browser, _chromium, _parse, _section, missing_tool

ALTERNATIVE = ('\n[[scenario.alternatives]]\nid = "strengthen_b"\ndescription = "TST-B strengthened to TST-A"\n'
               'building_class = "TST-B"\nnew_class = "TST-A"\nretrofit_cost_ratio = 0.05\n')


@pytest.fixture(scope="module")
def compute_run(tmp_path_factory):
    """A compute-mode run of the mini inputs (one fault, a point source) with a retrofit alternative and events."""
    dst = tmp_path_factory.mktemp("visual") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("horizon_yr = 50\n", "horizon_yr = 50\n" + ALTERNATIVE, 1)
    cfg.write_text(text + "\n[portfolio]\nyears = 1000\n")
    return run_pure(cfg)


@pytest.fixture(scope="module")
def report(compute_run):
    return build_report(compute_run)


@pytest.fixture(scope="module")
def three_runs(tmp_path_factory):
    """Three runs of the mini inputs (ingest mode) in one output folder, the exposure changed between them."""
    dst = tmp_path_factory.mktemp("trend") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    exposure = dst / "exposure.csv"
    runs = [run_pure(dst / "quakefolio.toml")]
    for value in ("3000000", "4000000"):
        text = re.sub(r"^(B2,10\.029,20\.002,TST-A,)\d+", rf"\g<1>{value}", exposure.read_text(), flags=re.M)
        exposure.write_text(text)
        runs.append(run_pure(dst / "quakefolio.toml"))
    return runs


# --- map ---------------------------------------------------------------------------------------------

def _monotone_chain(points):
    """Convex hull by Andrew's monotone chain (Andrew 1979), counter-clockwise, collinear points dropped."""
    pts = sorted(set(map(tuple, points)))

    def cross(o, a, b):
        return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])

    lower, upper = [], []
    for p in pts:
        while len(lower) >= 2 and cross(lower[-2], lower[-1], p) <= 0:
            lower.pop()
        lower.append(p)
    for p in reversed(pts):
        while len(upper) >= 2 and cross(upper[-2], upper[-1], p) <= 0:
            upper.pop()
        upper.append(p)
    return lower[:-1] + upper[:-1]


def _shoelace(poly):
    x, y = np.asarray(poly, float).T
    return 0.5 * (x @ np.roll(y, -1) - y @ np.roll(x, -1))


def test_outline_is_the_convex_hull():
    rng = np.random.default_rng(3)
    lon, lat = 10 + rng.normal(0, 0.05, 2000), 20 + rng.normal(0, 0.03, 2000)
    hull = portfolio_outline(lon, lat)
    ref = _monotone_chain(np.column_stack([lon, lat]))
    assert sorted(map(tuple, hull)) == sorted(ref)
    assert _shoelace(hull) > 0  # counter-clockwise
    np.testing.assert_allclose(_shoelace(hull), _shoelace(ref), rtol=1e-12)
    # collinear positions: the two ends; two positions: both
    line = portfolio_outline([0.0, 1.0, 2.0, 3.0], [0.0, 1.0, 2.0, 3.0])
    assert sorted(map(tuple, line)) == [(0.0, 0.0), (3.0, 3.0)]
    assert len(portfolio_outline([1.0, 2.0], [1.0, 1.0])) == 2


def test_map_cells_mean_collapse_probability():
    rng = np.random.default_rng(8)
    n = 6000
    d = pd.DataFrame({"lon": 10 + rng.uniform(0, 0.2, n), "lat": 20 + rng.uniform(0, 0.2, n),
                      "replacement_value": rng.uniform(1e5, 1e6, n), "eal_ratio": rng.uniform(0, 1e-3, n),
                      "collapse_prob_in_horizon": rng.uniform(0, 0.2, n)})
    cells, _ = map_cells(d)
    # expected collapses are kept: sum over cells of (mean probability x buildings) = sum over buildings
    np.testing.assert_allclose((cells.collapse_prob_in_horizon * cells.n_assets).sum(),
                               d.collapse_prob_in_horizon.sum(), rtol=1e-12)
    assert cells.collapse_prob_in_horizon.between(0, 0.2).all()


def test_map_figure_draws_faults_sites_and_outline():
    import matplotlib

    d = pd.DataFrame({"lon": [10.0, 10.03, 10.0, 10.03], "lat": [20.0, 20.0, 20.03, 20.03],
                      "replacement_value": [1e6, 2e6, 3e6, 4e6], "eal_ratio": [1e-3, 2e-3, 3e-3, 4e-3],
                      "collapse_prob_in_horizon": [0.01, 0.02, 0.03, 0.04]})
    faults = pd.DataFrame({"source_branch": ["b"] * 4, "source_id": ["near", "near", "far", "far"],
                           "region": ["active_crustal"] * 4, "point_index": [0, 1, 0, 1],
                           "lon": [9.99, 10.04, 12.0, 12.1], "lat": [20.01, 20.02, 22.0, 22.1]})
    sites = pd.DataFrame({"site_id": ["S1", "S2"], "lon": [10.0, 10.03], "lat": [20.0, 20.03]})
    with matplotlib.rc_context(_RC):
        for colouring in ("eal", "collapse", "value"):
            fig, _capped, bar_km, layers = map_figure(d, "USD", colouring, horizon=50, faults=faults, sites=sites,
                                                      outline=portfolio_outline(d.lon, d.lat))
            ax = fig.axes[0]
            gids = {a.get_gid() for a in ax.lines + ax.collections}
            assert {"fault:near", "outline", "sites"} <= gids and "fault:far" not in gids
            assert layers.faults == ("near",) and layers.faults_outside == ("far",)
            assert layers.sites == 2 and layers.outline_vertices == 4 and bar_km > 0


def test_map_section_hands_the_layers_to_the_figure(compute_run, monkeypatch):
    seen = []

    def spy(d, cur, colouring, **kw):
        seen.append((colouring, kw))
        return real(d, cur, colouring, **kw)

    real = sections_assets.map_figure
    monkeypatch.setattr(sections_assets, "map_figure", spy)
    import matplotlib

    with matplotlib.rc_context(_RC):
        html = sections_assets._section_map(ReportRun(compute_run))
    assert [c for c, _ in seen] == ["eal", "collapse", "value"]
    sites = read_table(compute_run, "hazard_sites")
    faults = read_table(compute_run, "source_faults")
    for _, kw in seen:
        assert set(kw["faults"].source_id) == {"test_fault"}
        assert len(kw["sites"]) == len(sites) and len(kw["outline"]) >= 3
    assert 'data-faults="1"' in html and f'data-sites="{len(sites)}"' in html
    # the stored trace is the one of the source file, per source-model branch
    trace = faults[faults.source_branch == faults.source_branch.iloc[0]].sort_values("point_index")
    assert trace[["lon", "lat"]].to_numpy().tolist() == [[9.86, 19.95], [10.14, 19.97]]


# --- what-if and screening ---------------------------------------------------------------------------

def test_screening_tiers_against_interval_rules():
    rng = np.random.default_rng(1)
    ratio = np.concatenate([rng.uniform(0, 4, 500), [0.0, 0.5, 1.0, 2.0, np.nan, 1e9]])
    expected = [-1 if r != r else next(k for k, (_, lo, hi) in enumerate(TIERS) if (lo < r or k == 0) and r <= hi)
                for r in ratio]
    assert screening_tiers(ratio).tolist() == expected
    assert ((screening_tiers(ratio) >= 2) == (ratio > 1)).all()  # "above" is exactly exceeds_target


def test_metric_labels_are_plain():
    assert metric_label("aep_loss", "ground_up", 475.0, "USD") == \
        "Probable maximum loss, aggregate (AEP), ground-up, 475-year [USD]"
    assert metric_label("eal", "classical", float("nan"), "USD/yr") == "Expected annual loss, classical [USD/yr]"
    assert "_" not in metric_label("some_new_metric", None, float("nan"), "-")


def test_whatif_reads_well(report, compute_run):
    body = _section(report, "whatif")
    text = html.unescape(re.sub(r"<[^>]+>", " ", body))
    assert not re.search(r"\d\.\d+e[+-]\d", text)  # no scientific notation
    for raw in ("aep_loss", "oep_loss", "tvar_loss", "expected_collapses", "ground_up", "assets_exceeding"):
        assert raw not in text  # plain labels, not column names
    assert "Verdict for 'strengthen_b'" in text and "benefit-cost ratio" in text
    bc = read_table(compute_run, "whatif_benefit_cost")
    total = bc[bc.scope == "alternative"].iloc[0]
    assert f"{total.retrofit_cost:,.0f} USD" in text
    for asset in bc[bc.scope == "asset"].asset_id:
        assert f">{asset}<" in body  # few buildings: every one is listed
    assert body.count("<img") == 1  # the retrofit fragility beside the original
    # the stored retrofit class is the library's class, number for number
    stored = library_from_frame(read_table(compute_run, "whatif_fragility").drop(columns=["alternative_id"]))
    lib = load_library(MINI / "fragility.toml")
    np.testing.assert_array_equal(stored["TST-A"].medians, lib["TST-A"].medians)
    np.testing.assert_array_equal(stored["TST-A"].betas, lib["TST-A"].betas)


def test_screening_tiers_in_the_report(report, compute_run):
    body = _section(report, "screening")
    scr = read_table(compute_run, "collapse_screening")
    tiers = screening_tiers(scr.ratio_to_target)
    # counts per tier, computed here from the table with pandas' interval rules
    cut = pd.cut(scr.ratio_to_target, [0, 0.5, 1, 2, np.inf], right=True, include_lowest=True, labels=False)
    assert (cut.to_numpy() == tiers).all()
    for k, (label, _lo, _hi) in enumerate(TIERS):
        m = re.search(rf"<td[^>]*>{re.escape(label)}</td><td[^>]*>[^<]*</td><td class=n data-v=\"(\d+)\"", body)
        assert m and int(m.group(1)) == int((cut == k).sum()), label
    assert "ASCE/SEI 7-16 Chapter 21" in body and "target_basis" in body


# --- trend -------------------------------------------------------------------------------------------

def test_trend_of_three_runs_matches_history(three_runs):
    frame = trend_frame(ReportRun(three_runs[-1]))
    hist, _ = run_history(three_runs[-1].parent.parent)
    assert frame.run_id.tolist() == hist.run_id.tolist() == [p.name for p in three_runs]
    np.testing.assert_array_equal(frame.classical_eal.to_numpy(), hist.classical_eal.to_numpy())
    eal = [read_table(r, "asset_loss").eal.sum() for r in three_runs]  # independent sum
    np.testing.assert_allclose(frame.classical_eal.to_numpy(), eal, rtol=1e-12)
    assert eal[0] < eal[1] < eal[2]
    assert frame.changed_inputs.iloc[1].startswith("exposure")
    # the report of the second run shows only the runs up to it
    assert trend_frame(ReportRun(three_runs[1])).run_id.tolist() == [p.name for p in three_runs[:2]]


def test_trend_section_of_the_third_run(three_runs, tmp_path):
    from quakefolio.pipeline.io.cache import StageCache
    from quakefolio.pipeline.report.document import CACHED_SECTIONS
    from quakefolio.pipeline.report.sections_trend import _section_trend

    assert "trend" not in CACHED_SECTIONS  # it depends on the other runs of the folder
    cache = StageCache(tmp_path)
    drawn = _section(build_report(three_runs[-1], cache=cache), "trend")
    assert drawn.count("<tr>") == 1 + 3 and "(this run)" in drawn and drawn.count("<img") == 1
    again = _section(build_report(three_runs[-1], cache=cache), "trend")  # other sections from the cache
    assert again == drawn
    assert "No earlier run in this output folder" in _section_trend(ReportRun(three_runs[0]))


# --- rendered ----------------------------------------------------------------------------------------

def test_visual_items_render_in_headless_chromium(report, tmp_path):
    binary = _chromium()
    if binary is None:
        missing_tool("no Chromium binary (chromium, chromium-browser, google-chrome) on PATH")
    # once loaded: every image decoded (natural width), then the "collapse" radio clicked; record what shows
    probe = ("<script>window.addEventListener('load',function(){var b=document.body;"
             "var imgs=Array.prototype.slice.call(document.images);"
             "b.setAttribute('data-decoded',imgs.filter(function(i){return i.complete&&i.naturalWidth>0;}).length);"
             "b.setAttribute('data-images',imgs.length);"
             "var v=function(){return Array.prototype.filter.call(document.querySelectorAll('#map .views>div'),"
             "function(d){return !d.hidden&&d.offsetHeight>0;}).map(function(d){return d.getAttribute('data-view');})"
             ".join(',');};b.setAttribute('data-shown-first',v());"
             "document.querySelector('#map input[value=collapse]').click();b.setAttribute('data-shown-after',v());"
             "var w=document.querySelector('#whatif');b.setAttribute('data-whatif-overflow',"
             "Array.prototype.filter.call(w.querySelectorAll('table'),function(t){return t.scrollWidth>w.clientWidth+1;})"
             ".length);"
             "b.setAttribute('data-page-overflow',Array.prototype.filter.call(document.querySelectorAll('section table'),"
             "function(t){return t.getBoundingClientRect().right>t.closest('section').getBoundingClientRect().right+1;})"
             ".map(function(t){return t.closest('section').id;}).join(','));});</script>")
    page = tmp_path / "report.html"
    page.write_text(report.replace("</body>", probe + "</body>"), encoding="utf-8")
    done = _browser(binary, tmp_path, "--window-size=1280,2400", "--dump-dom", page.as_uri())
    if done.returncode != 0 and not done.stdout.strip():
        missing_tool(f"Chromium did not run: {done.stderr.strip().splitlines()[-1:]}")
    dom = _parse(done.stdout)
    body = dict(next(a for t, a in dom.tags if t == "body"))
    n_images = len(_parse(report).images())
    assert body.get("data-images") == body.get("data-decoded") == str(n_images)
    assert body.get("data-shown-first") == "eal" and body.get("data-shown-after") == "collapse"
    assert body.get("data-whatif-overflow") == "0"
    assert body.get("data-page-overflow") == ""  # no table of any section wider than the page
    maps = [a for t, a in dom.tags if t == "div" and a.get("class") == "map"]
    assert [m["data-colour"] for m in maps] == ["eal", "collapse", "value"]
    assert all(m["data-faults"] == "1" and int(m["data-sites"]) > 0 and int(m["data-outline"]) >= 3 for m in maps)
    for sid in ("map", "whatif", "screening", "trend"):
        assert sid in dom.sections
    for img in dom.images():
        data = base64.b64decode(img["src"].split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)


def test_manifest_lists_new_tables(compute_run):
    manifest = json.loads((compute_run / "manifest.json").read_text())
    assert {"source_faults", "whatif_fragility"} <= set(manifest["units"])

