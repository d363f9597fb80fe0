"""Event-based arithmetic in the core: random streams (quakefolio.core.events.eventset), event
ground motion on the classical engine's pairs (quakefolio.core.hazard) and event losses
and cross-check statistics (quakefolio.core.events.losses), each equal, bit for bit, to the
previous stage code on random inputs (kept below as the reference); the mean-damage-ratio mode's
sums, formed per (site, class) pair in another order of addition, to 1e-12 relative."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from quakefolio.core.events.losses import (
    aal_cross_check, annual_average_by, asset_aal_statistics, event_hazard_cross_check, exceedance_counts,
    portfolio_event_losses, sum_over_blocks,
)
from quakefolio.core.events.eventset import (
    MAX_CLASS_ENTRIES, STREAM_DAMAGE, STREAM_EVENT_SET, STREAM_GMM_CHOICE, STREAM_GROUND_MOTION, STREAM_LOSS_RATIO,
    block_rng, class_block_index, damage_block_rng, stream_rng,
)
from quakefolio.core.sources.geometry import pair_distances, site_rupture_mask
from quakefolio.core.gmm import GMM_REGISTRY, GmmInput, get_gmm
from quakefolio.core.events.programme import GroupSums
from quakefolio.core.events.motion import event_ground_motion
from quakefolio.core.sources.mfd import truncated_gr
from quakefolio.core.events.portfolio import (
    aal_with_standard_error, apply_policy, expected_loss_ratio, expected_loss_ratios, expected_net_loss_ratio,
    sample_loss_ratio,
)
from quakefolio.core.sources.ruptures import RuptureSet, planar_fault_ruptures, point_source_ruptures


def _same(a, b):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape and a.dtype == b.dtype
    assert a.tobytes() == b.tobytes()


# --- random streams ---------------------------------------------------------------------------

def test_stream_tags_are_distinct_and_seed_sequences_unchanged():
    tags = [STREAM_EVENT_SET, STREAM_GROUND_MOTION, STREAM_DAMAGE, STREAM_LOSS_RATIO, STREAM_GMM_CHOICE]
    assert len(set(tags)) == len(tags) and STREAM_GMM_CHOICE == 11 and MAX_CLASS_ENTRIES == 4096
    for seed in (0, 7, 2**40):
        want = np.random.default_rng(np.random.SeedSequence([seed, 11])).random(5)
        _same(stream_rng(seed, STREAM_GMM_CHOICE).random(5), want)
        for b, k in ((0, 0), (3, 2), (17, 4095)):
            want = np.random.default_rng(np.random.SeedSequence([seed, STREAM_DAMAGE, b * 4096 + k])).random(5)
            _same(damage_block_rng(seed, b, k).random(5), want)
            _same(block_rng(seed, class_block_index(b, k), stream=STREAM_DAMAGE).random(5), want)
    with pytest.raises(ValueError, match="class_entry"):
        class_block_index(0, 4096)
    with pytest.raises(ValueError, match="stream"):
        stream_rng(1, STREAM_GROUND_MOTION)


# --- event ground motion ----------------------------------------------------------------------

def _reference_ground_motion(site_lon, site_lat, site_vs30, ruptures, ev_rup, g_ev, gmms, ims, dmax, region, ref):
    """The previous stage code (its own pairs and GMM inputs)."""
    uniq, inv = np.unique(ev_rup, return_inverse=True)
    sub = ruptures.subset(uniq)
    n_sites, n_u = len(site_lon), len(uniq)
    mask = site_rupture_mask(site_lon, site_lat, sub, dmax, metric="rjb", exact=True, ref_lon=ref[0], ref_lat=ref[1])
    si, ri = np.nonzero(mask)
    mu = np.full((len(gmms), len(ims), n_sites, n_u), -np.inf)
    tau = np.zeros_like(mu)
    phi = np.zeros_like(mu)
    if si.size:
        d = pair_distances(site_lon, site_lat, sub, si, ri, ref_lon=ref[0], ref_lat=ref[1])
        inp = GmmInput(mag=sub.mag[ri], vs30_mps=site_vs30[si], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"],
                       rx_km=d["rx_km"], ry0_km=d["ry0_km"], ztor_km=sub.ztor_km[ri], zhyp_km=sub.zhyp_km[ri],
                       dip_deg=sub.dip_deg[ri], rake_deg=sub.rake_deg[ri], width_km=sub.width_km[ri], region=region)
        for g in np.unique(g_ev):
            res = gmms[g].evaluate(inp, ims)
            mu[g][:, si, ri] = res.ln_median
            tau[g][:, si, ri] = res.tau
            phi[g][:, si, ri] = res.phi
    return mu[g_ev, :, :, inv], tau[g_ev, :, :, inv], phi[g_ev, :, :, inv]


@pytest.mark.parametrize("seed", range(3))
def test_event_ground_motion_equals_the_previous_stage_code(seed):
    rng = np.random.default_rng(seed)
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.2, bin_width=0.2, rate_above_mmin=0.05)
    rs = RuptureSet.concat([
        planar_fault_ruptures("f", [(9.9, 19.95), (10.2, 19.99)], dip_deg=60, rake_deg=90, upper_depth_km=0,
                              lower_depth_km=12, mfd=mfd),
        point_source_ruptures("p", 11.5, 20.3, mfd=mfd, hypo_depths=[(8.0, 1.0)], mechanisms=[(0, 90, -90, 1.0)],
                              upper_depth_km=0, lower_depth_km=15)])
    n_sites = int(rng.integers(1, 30))
    lon, lat = rng.uniform(9.5, 11.0, n_sites), rng.uniform(19.7, 20.4, n_sites)
    vs30 = rng.uniform(200, 900, n_sites)
    gmms = [get_gmm("BSSA14"), get_gmm("CB14")]
    ims = ["PGA", "SA_0.3", "SA_1.0"]
    n_ev = int(rng.integers(1, 200))
    ev_rup = rng.integers(0, len(rs), n_ev)  # in no order, as the events of a chunk
    g_ev = rng.integers(0, 1 + seed % 2, n_ev)  # seed 0, 2: one model only
    ev_rup[-1], g_ev[-1] = ev_rup[0], g_ev[0]  # at least one (model, rupture) drawn twice: rows copied
    args = (lon, lat, vs30, rs, ev_rup, g_ev, gmms, ims)
    want = _reference_ground_motion(*args, 60.0, "california", (10.3, 20.0))
    # each model only on the ruptures of its events, in passes of a few ruptures: the same values
    for pair_block in (1, 37, 100_000):
        got = event_ground_motion(*args, max_distance_km=60.0, region="california", ref=(10.3, 20.0),
                                  pair_block=pair_block)
        for g, w in zip(got, want):
            _same(g, w)
    assert np.isinf(got[0]).any() and np.isfinite(got[0]).any()  # both sides of the integration distance


@pytest.mark.parametrize("name", sorted(GMM_REGISTRY))
def test_models_are_elementwise_on_subsets_of_scenarios(name):
    # event_ground_motion evaluates each model on subsets of the pairs (GmmInput.take): every
    # value must be the one the model gives that scenario among all the others
    rng = np.random.default_rng(4)
    n = 400
    model = get_gmm(name)
    region = "california" if "california" in model.supported_regions else model.supported_regions[0]
    mag = rng.uniform(4.5, 7.8, n)
    width = rng.uniform(3.0, 20.0, n)
    inp = GmmInput(mag=mag, vs30_mps=rng.uniform(180, 1200, n), rrup_km=rng.uniform(1.0, 200.0, n),
                   rjb_km=rng.uniform(0.0, 199.0, n), rx_km=rng.uniform(-50, 50, n), ry0_km=rng.uniform(0, 30, n),
                   ztor_km=rng.uniform(0, 5, n), zhyp_km=rng.uniform(5, 15, n), dip_deg=rng.uniform(30, 90, n),
                   rake_deg=rng.uniform(-180, 180, n), width_km=width, rhyp_km=rng.uniform(10.0, 250.0, n),
                   intraslab=rng.uniform(size=n) < 0.5, backarc=rng.uniform(size=n) < 0.5,
                   vs30_measured=rng.uniform(size=n) < 0.5, region=region)
    ims = list(model.supported_ims[:1]) + ["SA_0.3", "SA_1.0"]
    whole = model.evaluate(inp, ims)
    for idx in (np.arange(0, n, 7), np.sort(rng.choice(n, 60, replace=False)), np.array([5])):
        sub = inp.take(idx)
        assert sub.shape == (idx.size,)
        part = model.evaluate(sub, ims)
        for field in ("ln_median", "tau", "phi", "sigma"):
            _same(getattr(part, field), getattr(whole, field)[:, idx])


# --- event losses -----------------------------------------------------------------------------

def _reference_losses(im, classes, value, ded, lim, loss_model, seed, blocks, per_asset=None):
    """The previous stage loop (event_chunk), with the mean mode's net loss now the expected net loss
    given the intensity (expected_net_loss_ratio, checked against Monte Carlo in test_net_loss.py).
    ``per_asset``: an (n_events, n_assets) array that receives every asset's net loss."""
    n_ev, n_assets = im.shape[0], len(value)
    gu_ev, net_ev = np.zeros(n_ev), np.zeros(n_ev)
    bounds = [(lo, hi) for _, lo, hi in blocks]
    asset_sum = np.zeros((len(bounds), 2, n_assets))
    asset_sumsq = np.zeros((len(bounds), 2, n_assets))
    class_sum = np.zeros((len(bounds), len(classes), 2))
    for k, (assets, i_im, med, beta, mdr, cov, usites, pair) in enumerate(classes):
        x = im[:, i_im, usites]
        if loss_model == "mean_damage_ratio":
            ratio = expected_loss_ratio(x, med, beta, mdr)[:, pair]
        else:
            parts = []
            for b, lo, hi in blocks:
                rng = block_rng(seed, b * 4096 + k, stream=STREAM_DAMAGE)
                parts.append(sample_loss_ratio(rng, x[lo:hi][:, pair], med, beta, mdr, cov)[1])
            ratio = np.concatenate(parts)
        gu = ratio * value[assets]
        net = apply_policy(gu, ded[assets], lim[assets])
        if loss_model == "mean_damage_ratio":
            net = value[assets] * expected_net_loss_ratio(x[:, pair], med, beta, mdr, cov, value[assets], ded[assets],
                                                          lim[assets])
        gu_ev += gu.sum(axis=1)
        net_ev += net.sum(axis=1)
        if per_asset is not None:
            per_asset[:, assets] = net
        for j, (lo, hi) in enumerate(bounds):
            g, n = gu[lo:hi], net[lo:hi]
            asset_sum[j, 0, assets], asset_sum[j, 1, assets] = g.sum(axis=0), n.sum(axis=0)
            asset_sumsq[j, 0, assets], asset_sumsq[j, 1, assets] = (g * g).sum(axis=0), (n * n).sum(axis=0)
            class_sum[j, k] = g.sum(), n.sum()
    return gu_ev, net_ev, asset_sum, asset_sumsq, class_sum


def _random_portfolio(rng):
    n_sites, n_assets, n_ims = int(rng.integers(2, 12)), int(rng.integers(3, 60)), 2
    n_ev = int(rng.integers(5, 700))
    im = np.exp(rng.normal(-2.0, 1.2, (n_ev, n_ims, n_sites)))
    im[rng.random(im.shape) < 0.1] = 0.0  # beyond the integration distance
    site = rng.integers(0, n_sites, n_assets)
    cls = rng.integers(0, 3, n_assets)
    classes = []
    for c in range(3):
        assets = np.flatnonzero(cls == c)
        if not assets.size:
            continue
        usites, pair = np.unique(site[assets], return_inverse=True)
        med = np.sort(rng.uniform(0.1, 1.5, 3))
        classes.append((assets, c % n_ims, med, rng.uniform(0.3, 0.7, 3), np.array([0.05, 0.3, 1.0]),
                        np.array([0.5, 0.3, 0.0]), usites, pair))
    value = rng.uniform(1e5, 1e7, n_assets)
    ded = np.where(rng.random(n_assets) < 0.3, np.nan, rng.uniform(0, 2e5, n_assets))
    lim = np.where(rng.random(n_assets) < 0.3, np.nan, rng.uniform(1e5, 5e6, n_assets))
    b0 = int(rng.integers(0, 5))
    edges = list(range(0, n_ev, 256)) + [n_ev]
    blocks = [(b0 + j, lo, hi) for j, (lo, hi) in enumerate(zip(edges[:-1], edges[1:]))]
    return im, classes, value, ded, lim, blocks


@pytest.mark.parametrize("loss_model", ["mean_damage_ratio", "sampled_damage"])
@pytest.mark.parametrize("seed", range(4))
def test_portfolio_event_losses_equal_the_previous_stage_loop(seed, loss_model):
    im, classes, value, ded, lim, blocks = _random_portfolio(np.random.default_rng(seed))
    got = portfolio_event_losses(im, classes, value, ded, lim, loss_model=loss_model, seed=seed, blocks=blocks)
    want = _reference_losses(im, classes, value, ded, lim, loss_model, seed, blocks)
    for g, w in zip(got, want):
        if loss_model == "sampled_damage":
            _same(g, w)
        else:  # mean mode: sums per (site, class) pair, another order of addition (pair_mean_losses)
            assert g.shape == w.shape
            np.testing.assert_allclose(g, w, rtol=1e-12, atol=0)
    gu, net, asset_sum, _, class_sum = got
    assert (net <= gu + 1e-6).all()
    np.testing.assert_allclose(asset_sum.sum(axis=2), class_sum.sum(axis=1), rtol=1e-12)


@pytest.mark.parametrize("loss_model", ["mean_damage_ratio", "sampled_damage"])
def test_group_sums_of_event_losses(loss_model):
    # terms groups (programme): per event, the net losses of each group's assets; in the mean mode
    # the assets without terms enter per (site, class) pair (GroupSums.add_pairs)
    im, classes, value, ded, lim, blocks = _random_portfolio(np.random.default_rng(7))
    group = np.random.default_rng(8).integers(0, 4, len(value))
    sums = GroupSums(group, 4, im.shape[0])
    portfolio_event_losses(im, classes, value, ded, lim, loss_model=loss_model, seed=3, blocks=blocks,
                           group_sums=sums)
    net = np.zeros((im.shape[0], len(value)))
    _reference_losses(im, classes, value, ded, lim, loss_model, 3, blocks, per_asset=net)
    want = np.stack([net[:, group == g].sum(axis=1) for g in range(4)], axis=1)
    np.testing.assert_allclose(sums.total, want, rtol=1e-12, atol=1e-9)


def _vulnerability_portfolio(rng):
    """The random portfolio with its first class a vulnerability table (invented rows, feasible CoVs)."""
    from quakefolio.core.vulnerability import VulnerabilityTable, check_vulnerability

    im, classes, value, ded, lim, blocks = _random_portfolio(rng)
    table = VulnerabilityTable(*check_vulnerability(np.array([0.05, 0.2, 0.5, 1.0, 2.0]),
                                                    np.array([0.0, 0.05, 0.2, 0.5, 0.8]),
                                                    np.array([0.0, 0.8, 0.5, 0.3, 0.2])))
    assets, i_im, _, _, _, _, usites, pair = classes[0]
    classes[0] = (assets, i_im, table, None, None, None, usites, pair)
    return im, classes, value, ded, lim, blocks


@pytest.mark.parametrize("loss_model", ["mean_damage_ratio", "sampled_damage"])
@pytest.mark.parametrize("seed", range(3))
def test_vulnerability_class_event_losses_equal_the_per_asset_loop(seed, loss_model):
    # a vulnerability class beside damage-state classes: the mean mode summed per (site, class) pair
    # (pair_mean_losses) equals the per-asset expected ground-up and net losses
    # (vulnerability_loss_ratios, incomplete-beta identity) to round-off; the sampled mode, with the
    # terms applied only to the assets that have them, equals apply_policy on every asset bit for bit
    from quakefolio.core.events.losses import block_loss_sums, event_loss_ratio
    from quakefolio.core.vulnerability import vulnerability_loss_ratios

    im, classes, value, ded, lim, blocks = _vulnerability_portfolio(np.random.default_rng(100 + seed))
    group = np.random.default_rng(seed).integers(0, 3, len(value))
    sums = GroupSums(group, 3, im.shape[0])
    got = portfolio_event_losses(im, classes, value, ded, lim, loss_model=loss_model, seed=seed, blocks=blocks,
                                 group_sums=sums)
    bounds = [(lo, hi) for _, lo, hi in blocks]
    gu_ev, net_ev = np.zeros(im.shape[0]), np.zeros(im.shape[0])
    per_asset = np.zeros((im.shape[0], len(value)))
    for k, (assets, i_im, medians, betas, mdr, cov, usites, pair) in enumerate(classes):
        x = im[:, i_im, usites]
        v, d, lm = value[assets], ded[assets], lim[assets]
        if loss_model == "mean_damage_ratio":
            if k == 0:
                ratio, net_ratio = vulnerability_loss_ratios(x, *medians, v, d, lm, pair=pair)
            else:
                ratio, net_ratio = expected_loss_ratios(x, medians, betas, mdr, cov, v, d, lm, pair=pair)
            net = v * net_ratio
        else:
            ratio = event_loss_ratio(x, medians, betas, mdr, cov, pair, loss_model=loss_model, seed=seed,
                                     blocks=blocks, class_entry=k)
            net = apply_policy(ratio * v, d, lm)
        gu, n, a_sum, _, _ = block_loss_sums(ratio, v, d, lm, bounds, net=net)
        gu_ev += gu
        net_ev += n
        per_asset[:, assets] = net
        if loss_model == "sampled_damage":
            _same(got[2][:, :, assets], a_sum)
    want_groups = np.stack([per_asset[:, group == g].sum(axis=1) for g in range(3)], axis=1)
    if loss_model == "sampled_damage":
        _same(got[0], gu_ev)
        _same(got[1], net_ev)
    else:
        np.testing.assert_allclose(got[0], gu_ev, rtol=1e-12, atol=0)
        np.testing.assert_allclose(got[1], net_ev, rtol=1e-12, atol=0)
    np.testing.assert_allclose(sums.total, want_groups, rtol=1e-12, atol=1e-9)
    assert (got[1] <= got[0] + 1e-6).all() and (got[1] < got[0]).any()


def test_exceedance_counts_and_group_sums():
    rng = np.random.default_rng(5)
    ln_im = rng.normal(-2, 1, (300, 2, 4))
    ln_im[0, 0, 0] = -np.inf
    levels = np.geomspace(0.01, 1.0, 6)
    counts = exceedance_counts(ln_im, levels)
    assert counts.shape == (2, 4, 6)
    for i, s, j in ((0, 0, 0), (1, 3, 5), (0, 2, 3)):
        assert counts[i, s, j] == sum(1 for e in range(300) if np.exp(ln_im[e, i, s]) > levels[j])
    parts = [rng.random((3, 2, 5)), rng.random((1, 2, 5))]
    _same(sum_over_blocks(parts), np.concatenate(parts).sum(axis=0))
    idx, loss = np.array([0, 2, 2, 0]), np.array([1.0, 2.0, 3.0, 4.0])
    _same(annual_average_by(idx, loss, 3, 10), np.array([0.5, 0.0, 0.5]))


# --- statistics and cross-checks --------------------------------------------------------------

def test_aal_statistics_and_cross_checks_equal_the_previous_stage_code():
    rng = np.random.default_rng(11)
    n, n_assets = 500, 40
    asset_sum = rng.uniform(0, 1e6, (2, n_assets))
    asset_sumsq = asset_sum ** 2 / 3
    asset_sum[:, :3] = 0.0
    asset_sumsq[:, :3] = 0.0
    classical = asset_sum[0] / n * rng.normal(1, 0.05, n_assets)
    classical[1] = 0.0  # se = 0 and equal; asset 2 keeps classical 0 too; asset 0 differs
    classical[0] = 1.0
    years = rng.uniform(0, 1e7, n)
    # previous stage code: the asset table
    frame = pd.DataFrame({"aal_ground_up": asset_sum[0] / n, "se": np.sqrt(asset_sumsq[0]) / n})
    with np.errstate(divide="ignore", invalid="ignore"):
        z_table = np.where(frame.se > 0, (frame.aal_ground_up - classical) / frame.se,
                           np.where(np.abs(frame.aal_ground_up - classical) <= 1e-9 * (1 + classical), 0.0, np.inf))
    aal_gu, aal_net, se, z = asset_aal_statistics(asset_sum, asset_sumsq, n, classical)
    _same(aal_gu, asset_sum[0] / n)
    _same(aal_net, asset_sum[1] / n)
    _same(se, frame.se.to_numpy())
    _same(z, z_table)
    assert z[0] == np.inf and z[1] == 0.0
    # previous stage code: the checks
    with np.errstate(divide="ignore", invalid="ignore"):
        z_check = np.where(se > 0, (aal_gu - classical) / se, 0.0)
    total_aal, total_se = aal_with_standard_error(years)
    total_cl = float(classical.sum())
    got = aal_cross_check(asset_sum[0], asset_sumsq[0], n, classical, years)
    assert got == {
        "assets": n_assets, "within_3_standard_errors": int(np.sum(np.abs(z_check) <= 3)),
        "share_within_3_standard_errors": float(np.mean(np.abs(z_check) <= 3)),
        "max_abs_z": float(np.max(np.abs(z_check))), "event_based_aal": float(total_aal),
        "standard_error": float(total_se), "classical_eal": total_cl,
        "z": float((total_aal - total_cl) / total_se), "passed": bool(abs(total_aal - total_cl) <= 3 * total_se)}
    curves = np.geomspace(1.0, 1e-4, 8)[None, None, :] * rng.uniform(0.5, 2, (2, 3, 1))
    counts = rng.poisson(curves * n)
    ok = curves > 10.0 / n
    zh = np.where(ok, (counts / n - curves) / np.sqrt(curves / n), 0.0)
    hz = event_hazard_cross_check(counts, curves, n)
    assert hz == {"compared_points": int(ok.sum()), "within_3_standard_errors": int(np.sum(np.abs(zh[ok]) <= 3)),
                  "share_within_3_standard_errors": float(np.mean(np.abs(zh[ok]) <= 3)),
                  "max_abs_z": float(np.max(np.abs(zh[ok]))), "rate_threshold_per_yr": 10.0 / n}
    empty = event_hazard_cross_check(np.zeros((1, 1, 2)), np.zeros((1, 1, 2)), n)
    assert empty["compared_points"] == 0 and empty["share_within_3_standard_errors"] == 1.0
    assert_array_equal(aal_cross_check(np.zeros(0), np.zeros(0), n, np.zeros(0), years)["assets"], 0)
