"""Correlated secondary uncertainty (quakefolio.core.events.secondary): limits, mean, variance, streams, stage.

Checks and their sources:

* correlation 0 gives the draws of independent sampling bit for bit
  (``quakefolio.core.events.portfolio.sample_loss_ratio``, the model before the change);
* correlation 1 gives comonotonic draws within a group: every asset's uniform is
  Phi(X_group) (Frechet upper bound; common practice);
* each asset's mean loss is unchanged by the correlation (the marginals of a copula are
  uniform; Monte Carlo within 4 standard errors of ``expected_loss_ratio``);
* the variance of the loss of n identical assets at a fixed intensity with deterministic loss
  per state is n Var(L) + n(n-1) Cov(L_i, L_k) (variance of a sum, common practice), with the
  pairwise exceedance P(DS_i >= j, DS_k >= l) = Phi2(Phi^-1(P_j), Phi^-1(P_l); rho) of the
  one-factor Gaussian copula (Vasicek 2002), evaluated by scipy.stats.multivariate_normal
  (Genz 2004 algorithm);
* the rank correlation of two loss ratios of one group in a fixed damage state is
  (6/pi) arcsin(rho/2), Spearman's rho of a bivariate normal (Kruskal 1958, eq. 5.3; from memory);
* streams: one per (event block, group), results identical whatever the chunking.
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import special, stats

from quakefolio.core.errors import InputError
from quakefolio.core.events.eventset import STREAM_GROUP_FACTOR, group_factor_rng
from quakefolio.core.events.losses import portfolio_event_losses
from quakefolio.core.events.portfolio import expected_loss_ratio, sample_loss_ratio
from quakefolio.core.events.secondary import (
    batch_change_standard_error, correlated_uniform, correlation_effect, group_factors, sample_correlated_loss_ratio,
)
from quakefolio.core.loss import beta_parameters

from conftest import MINI

MED, BETA = np.array([0.2, 0.45, 0.9]), np.array([0.5, 0.55, 0.6])
MDR, COV = np.array([0.05, 0.3, 1.0]), np.array([0.6, 0.4, 0.0])


def _same(a, b):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape and a.dtype == b.dtype and a.tobytes() == b.tobytes()


def _draw(rho, im, n_ev, seed=3, cov=COV):
    """Damage states and loss ratios of assets (columns) over n_ev events of one group."""
    z = np.random.default_rng(seed + 1000).standard_normal((n_ev, 2))
    x = np.broadcast_to(im, (n_ev, np.size(im)))
    return sample_correlated_loss_ratio(np.random.default_rng(seed), x, MED, BETA, MDR, cov,
                                        z[:, :1], z[:, 1:], rho), z


# --- limits -----------------------------------------------------------------------------------

def test_correlation_zero_is_independent_sampling_bit_for_bit():
    im = np.exp(np.random.default_rng(1).normal(-1.2, 0.8, (300, 40)))
    for seed in range(3):
        want = sample_loss_ratio(np.random.default_rng(seed), im, MED, BETA, MDR, COV)
        got = sample_correlated_loss_ratio(np.random.default_rng(seed), im, MED, BETA, MDR, COV, 5.0, -5.0, 0.0)
        for g, w in zip(got, want):
            _same(g, w)


def test_correlation_one_is_comonotonic_within_a_group():
    im = np.array([0.1, 0.3, 0.3, 0.6, 2.0])  # assets of one group at different intensities
    (state, lr), z = _draw(1.0, im, 2000)
    u, v = special.ndtr(z[:, 0]), special.ndtr(z[:, 1])
    p = stats.norm.cdf(np.log(im[None, :, None] / MED) / BETA)  # (1, n_assets, n_ds), P(DS >= j)
    assert (state == np.sum(p > u[:, None, None], axis=-1)).all()  # every asset uses the group's uniform
    assert (state[:, 1] == state[:, 2]).all() and (lr[:, 1] == lr[:, 2]).all()  # same intensity: identical
    assert (np.diff(state, axis=1) >= 0).all()  # comonotonic: higher intensity, never a lower state
    a, b = beta_parameters(MDR, COV)
    for j in (1, 2):  # random loss ratios: the group's quantile of each state's beta
        sel = state == j
        assert_allclose(lr[sel], special.betaincinv(a[j - 1], b[j - 1], np.broadcast_to(v[:, None], sel.shape)[sel]),
                        rtol=1e-12)


def test_correlated_uniform_limits_and_marginal():
    u = np.random.default_rng(2).random(200_000)
    z = np.random.default_rng(3).standard_normal(200_000)
    assert correlated_uniform(u, z, 0.0) is not None and (correlated_uniform(u, z, 0.0) == u).all()
    assert (correlated_uniform(u, z, 1.0) == special.ndtr(z)).all()
    w = correlated_uniform(u, z, 0.6)
    assert stats.kstest(w, "uniform").pvalue > 1e-3  # still U(0, 1)
    with pytest.raises(ValueError, match="rho"):
        correlated_uniform(u, z, 1.2)


# --- mean and variance ------------------------------------------------------------------------

@pytest.mark.parametrize("rho", [0.0, 0.3, 0.8, 1.0])
def test_mean_loss_is_unchanged_by_the_correlation(rho):
    im = np.array([0.15, 0.35, 0.7, 1.5])
    n = 60_000
    (_, lr), _ = _draw(rho, im, n, seed=11)
    want = expected_loss_ratio(im, MED, BETA, MDR)
    se = lr.std(axis=0, ddof=1) / np.sqrt(n)
    assert (np.abs(lr.mean(axis=0) - want) <= 4 * se).all()


def _pair_exceed(a, b, rho):
    """P(Z_i < a, Z_k < b), Z bivariate standard normal with correlation rho (scipy, Genz 2004)."""
    if rho >= 1.0:
        return stats.norm.cdf(min(a, b))
    if not np.isfinite(a) or not np.isfinite(b):
        return stats.norm.cdf(min(a, b))
    return stats.multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).cdf([a, b])


@pytest.mark.parametrize("rho", [0.25, 0.7])
def test_variance_of_identical_assets_follows_the_closed_form(rho):
    # n identical assets at one intensity, deterministic loss ratio per state (CoV 0):
    # L_i = sum_j dmu_j 1{DS_i >= j}, 1{DS_i >= j} = 1{Z_i < Phi^-1(P_j)}
    n, n_ev, im = 12, 40_000, 0.4
    p = stats.norm.cdf(np.log(im / MED) / BETA)
    dmu = np.diff(MDR, prepend=0.0)
    a = stats.norm.ppf(p)
    cov_pair = sum(dmu[j] * dmu[k] * (_pair_exceed(a[j], a[k], rho) - p[j] * p[k])
                   for j in range(3) for k in range(3))
    var_one = sum(dmu[j] * dmu[k] * (p[max(j, k)] - p[j] * p[k]) for j in range(3) for k in range(3))
    want = n * var_one + n * (n - 1) * cov_pair
    (_, lr), _ = _draw(rho, np.full(n, im), n_ev, seed=5, cov=np.zeros(3))
    total = lr.sum(axis=1)
    # the sample variance of 40,000 draws has a relative standard error of about
    # sqrt((kurtosis - 1) / N); allow 4 of them
    k = stats.kurtosis(total, fisher=False)
    assert_allclose(total.var(ddof=1), want, rtol=4 * np.sqrt((k - 1) / n_ev))
    indep = n * var_one
    assert want > 2 * indep  # the check is not a weak one: correlation more than doubles the variance


def test_loss_ratio_rank_correlation_is_the_copulas():
    rho, n_ev = 0.5, 50_000
    im = np.array([50.0, 50.0])  # every state exceeded: both assets in the top state, loss ratio random
    mdr, cov = np.array([0.05, 0.3, 0.6]), np.array([0.6, 0.4, 0.3])
    z = np.random.default_rng(8).standard_normal((n_ev, 2))
    _, lr = sample_correlated_loss_ratio(np.random.default_rng(9), np.broadcast_to(im, (n_ev, 2)), MED, BETA, mdr, cov,
                                         z[:, :1], z[:, 1:], rho)
    got = stats.spearmanr(lr[:, 0], lr[:, 1]).statistic
    want = 6 / np.pi * np.arcsin(rho / 2)
    assert abs(got - want) < 4 * 1.0 / np.sqrt(n_ev - 1)  # standard error of Spearman's rho ~ 1/sqrt(N-1)


# --- streams, chunking ------------------------------------------------------------------------

def test_group_factor_streams():
    want = np.random.default_rng(np.random.SeedSequence([7, STREAM_GROUP_FACTOR, 3, 2])).standard_normal(4)
    _same(group_factor_rng(7, 3, 2).standard_normal(4), want)
    blocks = [(3, 0, 256), (4, 256, 300)]
    f = group_factors(7, blocks, 3)
    _same(f[:256, 2], group_factor_rng(7, 3, 2).standard_normal((256, 2)))
    _same(np.concatenate([group_factors(7, blocks[:1], 3), group_factors(7, [(4, 0, 44)], 3)]), f)
    _same(group_factors(7, blocks, 5)[:, :3], f)  # more groups: the others' factors unchanged
    with pytest.raises(ValueError, match="group"):
        group_factor_rng(7, 0, -1)


def _portfolio(rng, n_ev=700):
    n_sites, n_assets = 6, 30
    im = np.exp(rng.normal(-1.5, 1.0, (n_ev, 1, n_sites)))
    site = rng.integers(0, n_sites, n_assets)
    cls = np.arange(n_assets) % 3
    classes = []
    for c in range(3):
        assets = np.flatnonzero(cls == c)
        usites, pair = np.unique(site[assets], return_inverse=True)
        classes.append((assets, 0, MED * (1 + 0.3 * c), BETA, MDR, COV, usites, pair))
    value = rng.uniform(1e5, 1e6, n_assets)
    ded = np.full(n_assets, 1e4)
    lim = np.full(n_assets, np.nan)
    edges = list(range(0, n_ev, 256)) + [n_ev]
    blocks = [(j, lo, hi) for j, (lo, hi) in enumerate(zip(edges[:-1], edges[1:]))]
    return im, classes, value, ded, lim, blocks, cls


def test_identical_whatever_the_chunking_and_zero_is_independent():
    im, classes, value, ded, lim, blocks, cls = _portfolio(np.random.default_rng(4))
    district = np.arange(len(value)) % 4  # a grouping that spans the classes
    kw = dict(loss_model="sampled_damage", seed=9, correlation=0.4, group=district)
    whole = portfolio_event_losses(im, classes, value, ded, lim, blocks=blocks, **kw)
    parts = []
    for b, lo, hi in blocks:  # one chunk per block
        parts.append(portfolio_event_losses(im[lo:hi], classes, value, ded, lim, blocks=[(b, 0, hi - lo)], **kw))
    _same(np.concatenate([p[0] for p in parts]), whole[0])
    _same(np.concatenate([p[2] for p in parts]), whole[2])
    indep = portfolio_event_losses(im, classes, value, ded, lim, blocks=blocks, loss_model="sampled_damage", seed=9)
    zero = portfolio_event_losses(im, classes, value, ded, lim, blocks=blocks, **{**kw, "correlation": 0.0})
    for a, b in zip(indep, zero):
        _same(a, b)
    assert not np.array_equal(whole[0], indep[0])


def test_correlation_effect_arithmetic():
    rng = np.random.default_rng(0)
    ind = rng.gamma(0.3, 1e6, 5000)
    cor = ind * rng.uniform(0.5, 1.6, 5000)
    out = correlation_effect(cor, ind, cor, ind, [10.0, 100.0])
    assert list(out["metric"]) == ["aal", "aep_loss", "aep_loss", "oep_loss", "oep_loss", "tvar_loss", "tvar_loss"]
    assert_allclose(out["value_correlated"][0], cor.mean(), rtol=1e-12)
    assert_allclose(out["change"], out["value_correlated"] - out["value_independent"], rtol=1e-12)
    assert_allclose(out["standard_error_of_change"][0], (cor - ind).std(ddof=1) / np.sqrt(5000), rtol=1e-12)
    se = out["standard_error_of_change"][1:]
    assert_allclose(se, batch_change_standard_error(ind, cor, ind, cor, [10.0, 100.0]), rtol=0, atol=0)
    assert np.isfinite(se).all() and (se > 0).all()  # 500-year batches hold both return periods


def test_batch_standard_error_arithmetic_and_short_batches():
    """By hand: the change in each batch of consecutive years, s_d / sqrt(K) (batch means)."""
    rng = np.random.default_rng(3)
    ind = rng.gamma(0.5, 1.0, 40)
    cor = ind + rng.normal(0.0, 0.1, 40) ** 2
    se = batch_change_standard_error(ind, cor, ind, cor, [2.0, 8.0], n_batches=4)
    d = [np.sort(cor[10 * k:10 * k + 10])[-5] - np.sort(ind[10 * k:10 * k + 10])[-5] for k in range(4)]
    assert_allclose(se[0], np.std(d, ddof=1) / 2.0, rtol=1e-12)  # PML(2 yr) of 10 years: 5th largest
    assert np.isfinite(se[:2]).all() and not np.isnan(se[4])
    assert np.isnan(batch_change_standard_error(ind, cor, ind, cor, [20.0], n_batches=4)).all()  # 10-yr batches
    with pytest.raises(ValueError, match="n_batches"):
        batch_change_standard_error(ind, cor, ind, cor, [2.0], n_batches=1)


def test_batch_standard_error_matches_the_spread_of_replications():
    """Monte Carlo of the same estimator: the batch-means standard error of a PML and TVaR change
    agrees with the standard deviation of that change over independent replications (batch means:
    common practice in simulation output analysis)."""
    rng = np.random.default_rng(11)
    reps, n = 400, 4000
    common = rng.lognormal(0.0, 1.5, (reps, n))  # the shared ground-motion part of each year
    ind = common * rng.lognormal(0.0, 0.3, (reps, n))
    cor = common * rng.lognormal(0.0, 0.5, (reps, n))
    rps = [20.0, 100.0]
    from quakefolio.core.events.portfolio import ep_from_years, tvar
    spread = np.concatenate([ep_from_years(cor, rps) - ep_from_years(ind, rps),
                             tvar(cor, rps) - tvar(ind, rps)], axis=-1).std(axis=0, ddof=1)
    estimates = np.array([batch_change_standard_error(ind[r], cor[r], ind[r], cor[r], rps) for r in range(reps)])
    mean_se = np.concatenate([estimates[:, :2], estimates[:, 4:]], axis=-1).mean(axis=0)
    assert_allclose(mean_se, spread, rtol=0.25)


# --- the stage --------------------------------------------------------------------------------

@pytest.fixture
def event_config(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace(
        "[exposure]", "[portfolio]\nyears = 20000\nseed = 7\nloss_model = \"sampled_damage\"\n\n[exposure]")
    cfg.write_text(text.replace("site_block_size = 2", "site_block_size = 2\nevent_block_size = 256"))
    return cfg


def _with(cfg, old, new):
    cfg.write_text(cfg.read_text().replace(old, new))


def test_stage_reports_the_correlation_effect(event_config):
    from quakefolio.pipeline.io.store import read_table
    from quakefolio.pipeline.runner import run_pure

    run = run_pure(event_config)
    summary = read_table(run, "portfolio_summary")
    assert (summary.secondary_correlation == 0.3).all() and (summary.secondary_group == "building_class").all()
    eff = read_table(run, "portfolio_correlation_effect")
    ep = read_table(run, "portfolio_ep")
    for basis in ("ground_up", "net"):
        e = eff[eff.basis == basis]
        aep = e[e.metric == "aep_loss"].value_correlated.to_numpy()
        _same(aep, ep[ep.basis == basis].aep_loss.to_numpy())  # the headline numbers are the correlated ones
        aal = e[e.metric == "aal"].iloc[0]
        assert abs(aal.change) <= 3 * aal.standard_error_of_change  # the mean is unchanged
    checks = json.loads((run / "manifest.json").read_text())["cross_checks"]
    assert checks["aal_correlated_vs_independent"]["passed"]
    # the independent counterpart (the twin on common random numbers) is the run with correlation 0
    # in distribution: the same ground motions, so its AAL agrees with that run's within its error
    _with(event_config, "seed = 7", "seed = 7\nsecondary_correlation = 0.0")
    zero = run_pure(event_config)
    assert "portfolio_correlation_effect" not in {p.stem for p in zero.glob("*.parquet")}
    s0 = read_table(zero, "portfolio_summary")
    for basis in ("ground_up", "net"):
        twin = eff[(eff.basis == basis) & (eff.metric == "aal")].value_independent.iloc[0]
        row = s0[s0.basis == basis].iloc[0]
        assert abs(twin - row.aal) <= 3 * row.aal_standard_error, (basis, twin, row.aal)


def test_stage_identical_whatever_the_chunking(event_config):
    from quakefolio.pipeline.io.store import read_table
    from quakefolio.pipeline.runner import run_pure

    a = run_pure(event_config)
    _with(event_config, "event_block_size = 256", "event_block_size = 4096")
    b = run_pure(event_config)
    for name in ("event_loss", "portfolio_ep", "asset_event_loss", "portfolio_correlation_effect"):
        pd.testing.assert_frame_equal(read_table(a, name), read_table(b, name), check_exact=True)


def test_grouping_column_from_the_exposure(event_config):
    from quakefolio.pipeline.io.store import read_table
    from quakefolio.pipeline.runner import run_pure
    from quakefolio.pipeline.stages.inputs import load_inputs

    ex = event_config.parent / "exposure.csv"
    rows = ex.read_text().splitlines()
    ex.write_text("\n".join([rows[0] + ",district"] + [r + (",north" if i % 2 else ",south")
                                                         for i, r in enumerate(rows[1:])]) + "\n")
    _with(event_config, "seed = 7", "seed = 7\nsecondary_group = \"district\"")
    run = run_pure(event_config)
    assert (read_table(run, "portfolio_summary").secondary_group == "district").all()
    _with(event_config, "secondary_group = \"district\"", "secondary_group = \"zone\"")
    with pytest.raises(InputError) as err:
        load_inputs(event_config)
    assert err.value.column == "zone" and err.value.row == 1


# --- the independent twin (common random numbers) -----------------------------------------

def test_twin_is_the_independent_model_on_the_same_own_uniforms():
    im = np.exp(np.random.default_rng(4).normal(-1.0, 0.8, (400, 30)))
    z = np.random.default_rng(5).standard_normal((400, 2))
    draw = lambda rho, twin: sample_correlated_loss_ratio(np.random.default_rng(6), im, MED, BETA, MDR, COV,
                                                          z[:, :1], z[:, 1:], rho, twin=twin)
    # the twin does not depend on the correlation it pairs with: only the group factors do
    for g, w in zip(draw(0.3, True), draw(0.9, True)):
        _same(g, w)
    # as the correlation goes to 0 the correlated draws converge to their twin, draw by draw
    s_small, lr_small = draw(1e-12, False)
    s_twin, lr_twin = draw(0.3, True)
    assert (s_small == s_twin).all()
    np.testing.assert_allclose(lr_small, lr_twin, rtol=0, atol=1e-5)
    with pytest.raises(ValueError, match="needs rho > 0"):
        draw(0.0, True)


def test_twin_has_the_independent_models_distribution():
    # Same marginals as independent sampling: damage-state frequencies against the fragility
    # (P(DS = j) = P*_j - P*_{j+1}) and loss-ratio moments against the beta's (mean, CoV).
    im = np.full((200_000, 1), 0.5)
    state, lr = sample_correlated_loss_ratio(np.random.default_rng(8), im, MED, BETA, MDR, COV, 0.0, 0.0, 0.5,
                                             twin=True)
    p = stats.norm.cdf(np.log(0.5 / MED) / BETA)
    want = -np.diff(np.r_[1.0, p, 0.0])
    got = np.bincount(state.ravel(), minlength=4) / state.size
    np.testing.assert_allclose(got, want, atol=4 * np.sqrt(want * (1 - want) / state.size).max())
    for j in (1, 2):
        sel = lr[state == j]
        se = MDR[j - 1] * COV[j - 1] / np.sqrt(sel.size)
        assert abs(sel.mean() - MDR[j - 1]) < 4 * se
        assert abs(sel.std() / sel.mean() - COV[j - 1]) < 0.02


def test_twin_makes_the_paired_change_precise():
    # Common random numbers: the paired difference between correlated and twin portfolio losses
    # has a far smaller spread than the difference from unrelated independent draws.
    rng = np.random.default_rng(11)
    n_ev, n_assets = 3000, 60
    im = np.exp(rng.normal(-1.0, 0.7, (n_ev, 1, 1)))
    classes = [(np.arange(n_assets), 0, MED, BETA, MDR, COV, np.array([0]), np.zeros(n_assets, int))]
    value = np.full(n_assets, 1e6)
    nan = np.full(n_assets, np.nan)
    kw = dict(loss_model="sampled_damage", seed=9, blocks=[(0, 0, n_ev)])
    corr = portfolio_event_losses(im, classes, value, nan, nan, correlation=1e-8,
                                  group=np.zeros(n_assets, int), **kw)[0]
    twin = portfolio_event_losses(im, classes, value, nan, nan, correlation=1e-8, twin=True, **kw)[0]
    indep = portfolio_event_losses(im, classes, value, nan, nan, **kw)[0]
    assert np.std(corr - twin) < 0.05 * np.std(corr - indep)
