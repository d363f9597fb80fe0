"""Tectonic regions of sources: source-model key, rupture storage, config branches, pipeline hazard, site inputs."""
import shutil

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.gmm import TECTONIC_REGIONS, get_gmm
from quakefolio.core.hazard import compute_site_hazard, rupture_ground_motion
from quakefolio.core.pairs import block_pairs
from quakefolio.core.sources.mfd import single_magnitude
from quakefolio.core.sources.ruptures import RuptureSet, point_source_ruptures
from quakefolio.pipeline import stages
from quakefolio.pipeline.io.gmm_regions import parse_region_branches
from quakefolio.pipeline.io.source_model import load_source_model
from quakefolio.pipeline.stages import hazard as hazard_stage

from conftest import MINI

BROKEN = MINI.parent / "broken"
#: The mini source model plus an invented intraslab point source (tests/data/broken/...).
SLAB_SOURCES = BROKEN / "config_region_without_branches" / "sources.toml"


def _point(sid, depth=10.0, layer=(0.0, 20.0)):
    return point_source_ruptures(sid, 10.0, 20.0, mfd=single_magnitude(6.0, 0.01), hypo_depths=[(depth, 1.0)],
                                 mechanisms=[(0.0, 90.0, 0.0, 1.0)], upper_depth_km=layer[0],
                                 lower_depth_km=layer[1])


def test_ruptures_are_active_crustal_by_default_and_keep_their_region():
    a = _point("a")
    assert a.regions == ("active_crustal",) and a.region_code.dtype == np.int8 and not a.region_code.any()
    b = _point("b", 60.0, (40.0, 80.0)).with_region("subduction_interface")
    both = RuptureSet.concat([a, b])
    assert [TECTONIC_REGIONS[c] for c in both.region_code] == ["active_crustal", "subduction_interface"]
    assert both.subset([1]).regions == ("subduction_interface",)
    assert RuptureSet.empty().region_code.size == 0
    with pytest.raises(ValueError, match="unknown tectonic region"):
        a.with_region("ocean")


def test_source_model_region_key():
    sm = load_source_model(SLAB_SOURCES)
    rows = {r["source_id"]: r for r in sm.sources}
    assert rows["test_fault"]["region"] == "active_crustal" and rows["test_slab"]["region"] == "subduction_intraslab"
    slab = sm.ruptures.source_index == sm.ruptures.source_ids.index("test_slab")
    assert (sm.ruptures.region_code[slab] == TECTONIC_REGIONS.index("subduction_intraslab")).all()
    assert not sm.ruptures.region_code[~slab].any()
    # the mini model has no region key: every rupture stays active crustal (bit for bit the same set)
    assert not load_source_model(MINI / "sources.toml").ruptures.region_code.any()


def test_region_branches_parse():
    got = parse_region_branches({"subduction_interface": [{"model": "AG16", "weight": 1.0}],
                                 "stable_continental": [{"model": "PZT11", "weight": 1}]})
    assert got == {"subduction_interface": [{"model": "AG16", "weight": 1.0, "id": "AG16"}],
                   "stable_continental": [{"model": "PZT11", "weight": 1.0, "id": "PZT11"}]}
    for bad, msg in [({"active_crustal": []}, "gmm_branches"), ({"subduction_inslab": []}, "did you mean"),
                     ({"subduction_intraslab": [{"model": "AG16", "weight": 0.5}]}, "sum to 1")]:
        with pytest.raises(Exception, match=msg):
            parse_region_branches(bad)


def test_event_ground_motion_takes_each_region_with_its_own_models():
    # An intraslab rupture evaluated with AG16 gives the model's own values at the pair's inputs
    # (hypocentral distance, intraslab, backarc), the same as the classical engine's pairs
    # (compute_site_hazard's closed form, Cornell 1968, in tests/test_gmm_oracle_regions.py).
    from quakefolio.core.gmm import GmmInput
    from quakefolio.core.events.motion import event_ground_motion

    crust = _point("c")
    slab = _point("s", 60.0, (40.0, 80.0)).with_region("subduction_intraslab")
    both = RuptureSet.concat([crust, slab])
    lon, lat, vs30 = np.array([10.0, 10.5]), np.array([20.0, 20.0]), np.array([400.0, 760.0])
    models = [get_gmm("BSSA14"), get_gmm("AG16")]
    fields = {"backarc": np.array([0.0, 1.0])}
    mu, tau, phi = event_ground_motion(lon, lat, vs30, both, np.array([1, 0, 1]), np.array([1, 0, 1]), models,
                                       ["PGA"], max_distance_km=300.0, ref=(10.0, 20.0), site_fields=fields)
    _, _, _, _, inp, _ = block_pairs(lon, lat, vs30, slab, 300.0, (10.0, 20.0), "global", backarc=fields["backarc"])
    # 0.5 deg of longitude at 20 N on a sphere of radius 6371 km: 52.24 km (spherical arc, common practice)
    assert_allclose(inp.rhyp_km, np.hypot([0.0, 0.5 * np.pi / 180 * 6371.0 * np.cos(np.radians(20.0))], 60.0),
                    rtol=1e-3)
    want = get_gmm("AG16").evaluate(GmmInput(mag=6.0, vs30_mps=vs30, rhyp_km=inp.rhyp_km, zhyp_km=60.0, intraslab=1,
                                             backarc=fields["backarc"]), ["PGA"])
    assert_allclose(mu[0, 0], want.ln_median[0], rtol=1e-12)
    assert_allclose(mu[2], mu[0], rtol=0)
    assert_allclose(tau[0, 0], want.tau[0], rtol=1e-12)
    assert np.isfinite(mu[1]).all()  # the crustal event with BSSA14
    with pytest.raises(ValueError, match="not a model of the subduction_intraslab region"):
        rupture_ground_motion(lon, lat, vs30, slab, [get_gmm("BSSA14")], ["PGA"], ref=(10.0, 20.0))
    with pytest.raises(ValueError, match="PZT11: the model gives only a total sigma"):
        rupture_ground_motion(lon, lat, vs30, crust.with_region("stable_continental"), [get_gmm("PZT11")], ["PGA"],
                              ref=(10.0, 20.0))


@pytest.fixture()
def slab_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    shutil.copy(SLAB_SOURCES, dst / "sources_slab.toml")
    text = (dst / "quakefolio_compute.toml").read_text()
    text = text.replace('{ file = "sources.toml", weight = 0.6 }', '{ file = "sources_slab.toml", weight = 0.6 }')
    text = text.replace('truncation_sigma = 3.0', 'truncation_sigma = 3.0\nregion_gmm_branches = '
                        '{ subduction_intraslab = [{ model = "AG16", weight = 1.0 }] }\nsite_backarc = true')
    text += "\n[portfolio]\nevent_based = false\n"
    (dst / "quakefolio_compute.toml").write_text(text)
    exposure = (dst / "exposure.csv").read_text().splitlines()
    extra = [",z1p0_km,backarc", ",0.4,0", ",,", ",,", ",,", ",,"]
    (dst / "exposure.csv").write_text("\n".join(line + e for line, e in zip(exposure, extra)) + "\n")
    return dst / "quakefolio_compute.toml"


def test_pipeline_hazard_sums_the_regions(slab_config):
    # Mean curve = sum over regions of each region's weighted-mean curve (linearity of the
    # hazard sum, Cornell 1968): recomputed here per region with the core engine.
    inputs = stages.load_inputs(slab_config)
    model, haz = inputs.hazard_model, inputs.hazard
    assert set(model.region_branches) == {"subduction_intraslab"}
    first = inputs.site_index[0]  # the first asset says forearc, the others take site_backarc = true
    backarc = model.site_fields["backarc"]
    assert backarc[first] == 0.0 and (np.delete(backarc, first) == 1.0).all()
    z1 = model.site_fields["z1p0_km"]
    assert z1[first] == 0.4 and np.isnan(np.delete(z1, first)).all()
    parts = [hazard_stage.hazard_block(model, haz, b) for b in hazard_stage.site_blocks(len(haz.site_id), 2)]
    model, _ = hazard_stage.combine_hazard(model, haz, parts)
    kw = dict(truncation_sigma=3.0, max_distance_km=150.0, ref=model.ref)
    crust = [get_gmm("BSSA14"), get_gmm("CB14")]
    expected = 0.0
    for (_, ws, src) in model.source_branches:
        rs = src.ruptures
        codes = rs.region_code
        c = compute_site_hazard(haz.lon, haz.lat, model.site_vs30, rs.subset(codes == 0), crust, model.ims,
                                model.levels_g, site_fields=dict(model.site_fields), **kw)
        expected = expected + ws * 0.5 * (c[0] + c[1])
        if codes.any():
            s = compute_site_hazard(haz.lon, haz.lat, model.site_vs30, rs.subset(codes > 0), crust[:1], model.ims,
                                    model.levels_g, site_fields=dict(model.site_fields),
                                    region_branches={"subduction_intraslab": [(1.0, get_gmm("AG16"))]}, **kw)[0]
            assert s.max() > 0
            expected = expected + ws * s
    assert_allclose(model.statistics["mean"], expected, rtol=1e-12)


@pytest.fixture()
def slab_events_config(slab_config):
    text = slab_config.read_text().replace("event_based = false", "event_based = true\nyears = 4000\nseed = 7")
    slab_config.write_text(text)
    return slab_config


def test_event_stage_draws_each_regions_models(slab_events_config):
    from quakefolio.pipeline.stages.events import event_chunk, event_chunks, prepare_events

    inputs = stages.load_inputs(slab_events_config)
    em = prepare_events(inputs)
    assert em.gmm_ids == ["BSSA14", "CB14", "AG16"]
    code = em.ruptures.region_code[em.events.rupture]
    ids = np.array(em.gmm_ids)[em.gmm_of_event]
    assert (ids[code > 0] == "AG16").all() and set(ids[code == 0]) == {"BSSA14", "CB14"}
    # intraslab events: Poisson count of the slab's 0.01/yr in the 0.6 of the years of its source branch
    # (whole logic tree); mean = variance = 24, within 5 standard deviations (common practice)
    expected = 0.01 * 0.6 * 4000
    assert abs(int((code > 0).sum()) - expected) < 5 * np.sqrt(expected)
    assert set(em.site_fields) == {"backarc", "z1p0_km"}
    again = prepare_events(stages.load_inputs(slab_events_config))
    assert np.array_equal(again.gmm_of_event, em.gmm_of_event)
    part = event_chunk(em, event_chunks(em)[0])
    assert np.isfinite(part.ground_up).all() and part.ground_up.max() > 0


def test_each_model_takes_vs30_clamped_to_its_own_range():
    # Stated rule (core.pairs.model_input): I14 (450-1200 m/s, Idriss 2014) at Vs30 300 gives exactly
    # its curve at 450; BSSA14 (150-1500 m/s) keeps 300; both in one call.
    from quakefolio.core.gmm import GmmInput
    from quakefolio.core.pairs import model_input

    rs = _point("c")
    lon, lat = np.array([10.1]), np.array([20.0])
    levels = np.geomspace(1e-3, 2.0, 12)
    i14, bssa = get_gmm("I14"), get_gmm("BSSA14")
    kw = dict(ref=(10.0, 20.0), max_distance_km=100.0)
    low = compute_site_hazard(lon, lat, [300.0], rs, [i14, bssa], ["PGA"], levels, **kw)
    at_450 = compute_site_hazard(lon, lat, [450.0], rs, [i14], ["PGA"], levels, **kw)[0]
    alone = compute_site_hazard(lon, lat, [300.0], rs, [bssa], ["PGA"], levels, **kw)[0]
    assert_allclose(low[0], at_450, rtol=0, atol=0)
    assert_allclose(low[1], alone, rtol=0, atol=0)
    assert not np.allclose(low[1], compute_site_hazard(lon, lat, [450.0], rs, [bssa], ["PGA"], levels, **kw)[0])
    inp = GmmInput(mag=6.0, vs30_mps=np.array([100.0, 760.0, 2000.0]), rjb_km=10.0)
    assert model_input(inp, bssa).vs30_mps.tolist() == [150.0, 760.0, 1500.0]
    inside = GmmInput(mag=6.0, vs30_mps=np.array([500.0]), rjb_km=10.0)
    assert model_input(inside, i14) is inside and model_input(inside, get_gmm("PZT11")) is inside


def test_spectrum_sums_add_the_regions_with_their_weights():
    # The spectrum's sums are linear in the pairs (Bazzurro & Cornell 1999 weights): with an intraslab
    # rupture they are the crustal sums plus the slab's with weight sum(gmm_weights) x its branch weight.
    from quakefolio.core.cms import compute_spectrum_sums

    crust = _point("c")
    slab = _point("s", 60.0, (40.0, 80.0)).with_region("subduction_intraslab")
    both = RuptureSet.concat([crust, slab])
    lon, lat, vs30 = np.array([10.05, 10.3]), np.array([20.0, 20.1]), np.array([400.0, 760.0])
    ims, cond = ["PGA", "SA_0.2", "SA_1.0"], ["SA_0.2"]
    targets = np.log(np.array([[[0.05, 0.2], [0.02, 0.1]]]))
    crustal, weights = [get_gmm("BSSA14"), get_gmm("CB14")], [0.3, 0.2]
    ag = get_gmm("AG16")
    fields = {"backarc": np.array([0.0, 1.0])}
    kw = dict(truncation_sigma=3.0, max_distance_km=200.0, ref=(10.0, 20.0), site_fields=fields)
    m, s = compute_spectrum_sums(lon, lat, vs30, both, crustal, weights, cond, ims, targets,
                                 region_branches={"subduction_intraslab": [(1.0, ag)]}, **kw)
    mc, sc = compute_spectrum_sums(lon, lat, vs30, crust, crustal, weights, cond, ims, targets, **kw)
    ms, ss = compute_spectrum_sums(lon, lat, vs30, slab, crustal[:1], [0.5], cond, ims, targets,
                                   region_branches={"subduction_intraslab": [(0.4, ag), (0.6, ag)]}, **kw)
    assert ms.any() and mc.any()
    assert_allclose(m, mc + ms, rtol=1e-12)
    assert_allclose(s, sc + ss, rtol=1e-12)


def test_manifest_records_the_site_inputs(slab_config):
    from quakefolio.pipeline.stages.regions import site_input_record

    inputs = stages.load_inputs(slab_config)
    rec = site_input_record(inputs.hazard_model)
    n = len(inputs.hazard.site_id)
    assert rec["hazard_sites"] == n and rec["basin_depth_sites"] == {"z1p0_km": 1, "z2p5_km": 0}
    assert rec["backarc_sites"] == n - 1
    assert set(rec["vs30_clamped_sites"]) == {"BSSA14", "CB14", "AG16"} and not any(rec["vs30_clamped_sites"].values())
    assert rec["basin_depth_rules"]["AG16"] == "no basin term" and rec["basin_depth_rules"]["CB14"].startswith("z2p5_km")


def _reference_event_motion(lon, lat, vs30, rs, ev_rup, g_ev, models, ims, fields):
    """The event ground motion of the code before the per-model pass (every distinct rupture
    evaluated with every model its region's events drew, then gathered per event)."""
    uniq, inv = np.unique(ev_rup, return_inverse=True)
    subset = rs.subset(uniq)
    code = subset.region_code[inv]
    evaluate = {int(c): np.unique(g_ev[code == c]) for c in np.unique(code)}
    mu, tau, phi = rupture_ground_motion(lon, lat, vs30, subset, models, ims, max_distance_km=300.0,
                                         ref=(10.0, 20.0), evaluate=evaluate, site_fields=fields)
    return mu[g_ev, :, :, inv], tau[g_ev, :, :, inv], phi[g_ev, :, :, inv]


def test_event_ground_motion_of_regions_equals_the_whole_rupture_evaluation():
    # Crustal, interface and intraslab ruptures in one chunk, site fields (basin depths with NaN,
    # backarc) and Vs30 outside the models' ranges (clamped per model): the per-model passes give
    # every value bit for bit as the evaluation of every rupture with its region's drawn models.
    from quakefolio.core.events.motion import event_ground_motion

    rng = np.random.default_rng(11)
    crust = [point_source_ruptures(f"c{i}", 10.0 + 0.3 * i, 20.0 - 0.2 * i, mfd=single_magnitude(5.5 + 0.4 * i, 0.01),
                                   hypo_depths=[(8.0, 1.0)], mechanisms=[(30.0 * i, 60.0, -90.0 + 90 * i, 1.0)],
                                   upper_depth_km=0.0, lower_depth_km=20.0) for i in range(3)]
    inter = _point("i", 30.0, (20.0, 45.0)).with_region("subduction_interface")
    slab = _point("s", 70.0, (50.0, 90.0)).with_region("subduction_intraslab")
    rs = RuptureSet.concat(crust + [inter, slab])
    n_sites = 9
    lon, lat = rng.uniform(9.5, 11.0, n_sites), rng.uniform(19.5, 20.5, n_sites)
    vs30 = np.array([100.0, 180.0, 300.0, 400.0, 760.0, 1200.0, 2500.0, 500.0, 250.0])
    fields = {"z1p0_km": np.where(rng.uniform(size=n_sites) < 0.3, np.nan, rng.uniform(0.01, 0.6, n_sites)),
              "z2p5_km": rng.uniform(0.5, 4.0, n_sites), "backarc": (rng.uniform(size=n_sites) < 0.5).astype(float)}
    models = [get_gmm("BSSA14"), get_gmm("CB14"), get_gmm("AG16")]
    ims = ["PGA", "SA_0.3", "SA_1.0"]
    n_ev = 60
    ev_rup = rng.integers(0, len(rs), n_ev)
    sub = rs.region_code[ev_rup] > 0
    g_ev = np.where(sub, 2, rng.integers(0, 2, n_ev))
    want = _reference_event_motion(lon, lat, vs30, rs, ev_rup, g_ev, models, ims, fields)
    assert np.isfinite(want[0][sub]).any() and np.isfinite(want[0][~sub]).any()
    for pair_block in (1, 20, 1_000_000):
        got = event_ground_motion(lon, lat, vs30, rs, ev_rup, g_ev, models, ims, max_distance_km=300.0,
                                  ref=(10.0, 20.0), site_fields=fields, pair_block=pair_block)
        for g, w in zip(got, want):
            np.testing.assert_array_equal(g, w)
    # each event's model must be one of its rupture's region, with tau and phi
    crustal_event = np.flatnonzero(~sub)[:1]
    with pytest.raises(ValueError, match="AG16 is not a model of the active_crustal region"):
        event_ground_motion(lon, lat, vs30, rs, ev_rup[crustal_event], np.array([2]), models, ims, ref=(10.0, 20.0))
    with pytest.raises(ValueError, match="PZT11: the model gives only a total sigma"):
        event_ground_motion(lon, lat, vs30, crust[0].with_region("stable_continental"), np.array([0]), np.array([0]),
                            [get_gmm("PZT11")], ["PGA"], ref=(10.0, 20.0))
