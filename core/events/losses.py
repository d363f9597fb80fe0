r"""Event losses of a portfolio and their checks against the classical model.

The arithmetic of the event-based stage between the sampled ground motion and the
tables, vectorised over events and assets:

1. **Loss per asset and event**: the loss ratio at the sampled intensity
   (:func:`quakefolio.core.events.portfolio.expected_loss_ratio`, or sampled damage states with
   one random stream per event block and class entry, optionally correlated within groups of
   assets, :mod:`quakefolio.core.events.secondary`), times the replacement value;
   policy terms per asset and event: on the sampled loss
   (:func:`quakefolio.core.events.portfolio.apply_policy`), or in the mean mode the
   expected net loss over damage states and loss ratios
   (:func:`quakefolio.core.events.portfolio.expected_loss_ratios`, closed form); a
   vulnerability class takes its loss ratio from its table
   (:mod:`quakefolio.core.vulnerability`: the interpolated mean, or a beta draw).
2. **Sums per random-number block** (per event, per asset, per class), so that totals do
   not depend on how blocks are grouped into tasks.  In the mean mode the ground-up loss is
   a function of the (site, class) pair's intensity, so the sums are formed per pair and
   the per-asset work is left to the assets with policy terms (:func:`pair_mean_losses`;
   the same sums in another order of addition, equal to 1e-12 relative); sampled damage
   draws per asset and event, and applies the terms only to the assets that have them
   (:func:`block_loss_sums`, bit for bit).
3. **Statistics of the simulation**: per-asset AAL with its compound-Poisson standard
   error, per-group averages, event-based exceedance rates.
4. **Cross-checks** against the classical results of the same model: z-scores of the
   event-based AAL against the classical EAL (per asset and for the portfolio), and of
   the event-based exceedance rates against the classical hazard curves.
"""
from __future__ import annotations

import threading

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.events.eventset import damage_block_rng
from quakefolio.core.events.portfolio import (
    aal_with_standard_error, apply_policy, expected_loss_ratio, has_policy_terms,
)
from quakefolio.core.loss import check_damage_ratios, net_loss_ratio
from quakefolio.core.risk import lognormal_fragility
from quakefolio.core.events.secondary import correlated_uniform, group_factors, sample_correlated_loss_ratio
from quakefolio.core.events.threads import serial_map
from quakefolio.core.vulnerability import VulnerabilityTable, cov_at, mean_loss_ratio_at, vulnerability_quantile

special = lazy_module("scipy.special")

__all__ = [
    "event_loss_ratio",
    "block_loss_sums",
    "PASS_VALUES",
    "state_exceedance",
    "pair_mean_losses",
    "portfolio_event_losses",
    "exceedance_counts",
    "sum_over_blocks",
    "annual_average_by",
    "asset_aal_statistics",
    "aal_cross_check",
    "event_hazard_cross_check",
]


def event_loss_ratio(x, medians, betas, mean_damage_ratio, cov, pair, *, loss_model, seed, blocks, class_entry,
                     correlation=0.0, factors=None, twin=False):
    r"""Loss ratio [-] of one class's assets in a chunk of events.

    Parameters
    ----------
    x : ndarray, shape (n_events, n_pairs) [IM units]
        Intensity at the class's unique (site, class) pairs.
    medians, betas, mean_damage_ratio, cov : ndarray, shape (n_ds,)
        The class's damage states (:func:`expected_loss_ratio`, :func:`sample_loss_ratio`); for a
        vulnerability class ``medians`` is its
        :class:`~quakefolio.core.vulnerability.VulnerabilityTable` (the others unused).
    pair : ndarray of int, shape (n_assets,)
        Pair of each asset of the class.
    loss_model : str
        ``"mean_damage_ratio"`` (:func:`expected_loss_ratio`) or any other value for
        sampled damage states (:func:`sample_loss_ratio`).
    seed : int
        The run's seed.
    blocks : sequence of (block index, first row, stop row)
        The chunk's random-number blocks and their rows in ``x``.
    class_entry : int
        Position of the class entry (its own random stream per block,
        :func:`quakefolio.core.events.eventset.damage_block_rng`).
    correlation : float
        Within-group correlation of the sampled damage states and loss ratios, in [0, 1]
        (:func:`quakefolio.core.events.secondary.sample_correlated_loss_ratio`); 0: independent.
    factors : ndarray, shape (n_events, n_assets, 2), or None [-]
        Group factors of each asset's group (:func:`quakefolio.core.events.secondary.group_factors`);
        needed when ``correlation > 0`` (not for the twin).
    twin : bool
        The independent twin of the draws with ``correlation`` (common random numbers,
        :mod:`quakefolio.core.events.secondary`).

    Returns
    -------
    ndarray, shape (n_events, n_assets) [-]
    """
    if isinstance(medians, VulnerabilityTable):
        return _vulnerability_ratio(x, medians, pair, loss_model, seed, blocks, class_entry, correlation, factors,
                                    twin)
    if loss_model == "mean_damage_ratio":
        return expected_loss_ratio(x, medians, betas, mean_damage_ratio)[:, pair]
    # one generator per event block and class: identical whatever the chunking
    parts = []
    for b, lo, hi in blocks:
        rng = damage_block_rng(seed, b, class_entry)
        f = (0.0, 0.0) if factors is None else (factors[lo:hi, :, 0], factors[lo:hi, :, 1])
        parts.append(sample_correlated_loss_ratio(rng, x[lo:hi][:, pair], medians, betas, mean_damage_ratio, cov,
                                                  f[0], f[1], correlation, twin=twin)[1])
    return np.concatenate(parts)


def _vulnerability_ratio(x, table, pair, loss_model, seed, blocks, class_entry, correlation, factors, twin):
    """:func:`event_loss_ratio` of a vulnerability class: its mean at ``x``, or one draw per asset-event.

    Draws by the inverse transform (:func:`quakefolio.core.vulnerability.vulnerability_quantile`) of
    one own uniform per asset-event from the class entry's stream of each block, made
    group-correlated through the loss-ratio factor (:mod:`quakefolio.core.events.secondary`) when
    ``correlation > 0`` (the twin: the same uniforms without it).
    """
    if loss_model == "mean_damage_ratio":
        return mean_loss_ratio_at(x[:, pair], table.levels, table.mean)
    parts = []
    for b, lo, hi in blocks:
        u = damage_block_rng(seed, b, class_entry).random((hi - lo, len(pair)))
        if correlation > 0 and not twin:
            u = correlated_uniform(u, factors[lo:hi, :, 1], correlation)
        parts.append(vulnerability_quantile(u, x[lo:hi][:, pair], *table))
    return np.concatenate(parts) if parts else np.zeros((0, len(pair)))


def block_loss_sums(ratio, value, deductible, limit, bounds, on_net=None, net=None, terms=None, on_ground_up=None):
    r"""Ground-up and net losses [currency] of assets over events, summed per event and per block.

    Parameters
    ----------
    ratio : ndarray, shape (n_events, n_assets) [-]
        Loss ratio of every asset-event.
    value : ndarray, shape (n_assets,) [currency]
        Replacement values.
    deductible, limit : ndarray, shape (n_assets,) [currency]
        Policy terms (NaN: none), :func:`apply_policy`.
    bounds : sequence of (first row, stop row)
        Rows of each random-number block.
    on_net : callable, optional
        Called with the net losses, shape (n_events, n_assets) [currency] (e.g.
        :meth:`quakefolio.core.events.programme.GroupSums.add` for group terms).
    net : ndarray, shape (n_events, n_assets), optional [currency]
        Net loss of every asset-event when already known (mean mode:
        :func:`quakefolio.core.events.portfolio.expected_net_loss_ratio` x value);
        otherwise the terms are applied to ``ratio x value``.
    terms : ndarray of bool, shape (n_assets,), optional
        :func:`quakefolio.core.events.portfolio.has_policy_terms` of the assets (computed
        when not given): the terms are applied to these assets only, the others' net
        loss is their ground-up loss.

    Returns
    -------
    event_ground_up, event_net : ndarray, shape (n_events,) [currency]
        Sums over the assets.
    asset_sum : ndarray, shape (n_blocks, 2, n_assets) [currency]
        Ground-up and net sums over each block's events.
    asset_sumsq : ndarray, shape (n_blocks, 2, n_assets) [currency^2]
        Sums of squares (for the compound-Poisson standard error).
    total : ndarray, shape (n_blocks, 2) [currency]
        Ground-up and net sums over each block's events and all assets.

    Notes
    -----
    Loss = ratio x value; net = :func:`apply_policy` unless given.  Without terms the
    policy returns the ground-up loss bit for bit
    (:func:`quakefolio.core.events.portfolio.has_policy_terms`), so it runs only on the
    assets with terms, and where no asset has any the net sums are the ground-up sums
    (not computed twice).  Sums are kept per random-number block so that totals do not
    depend on how blocks are grouped into tasks.
    """
    gu = ratio * value
    if net is None:
        net = _net_of(gu, deductible, limit, has_policy_terms(deductible, limit) if terms is None else terms)
    if on_net is not None:
        on_net(net)
    if on_ground_up is not None:
        on_ground_up(gu)
    n_assets = gu.shape[1]
    asset_sum = np.zeros((len(bounds), 2, n_assets))
    asset_sumsq = np.zeros((len(bounds), 2, n_assets))
    total = np.zeros((len(bounds), 2))
    same = net is gu
    for j, (lo, hi) in enumerate(bounds):
        for i, part in enumerate((gu,) if same else (gu, net)):
            b = part[lo:hi]
            asset_sum[j, i], asset_sumsq[j, i], total[j, i] = b.sum(axis=0), (b * b).sum(axis=0), b.sum()
        if same:
            asset_sum[j, 1], asset_sumsq[j, 1], total[j, 1] = asset_sum[j, 0], asset_sumsq[j, 0], total[j, 0]
    gu_ev = gu.sum(axis=1)
    return gu_ev, gu_ev.copy() if same else net.sum(axis=1), asset_sum, asset_sumsq, total


def _net_of(gu, deductible, limit, terms):
    """Net loss [currency]: :func:`apply_policy` on the assets with ``terms``, the ground-up loss elsewhere."""
    if not terms.any():
        return gu
    if terms.all():
        return apply_policy(gu, deductible, limit)
    t = np.flatnonzero(terms)
    net = gu.copy(order="K")  # the layout of ``gu``: sums over it add in the same order
    net[:, t] = apply_policy(gu[:, t], deductible[t], limit[t])
    return net


#: Values per pass of the elementwise arithmetic of the mean mode (and of the event fields,
#: :func:`quakefolio.core.events.motion.event_ln_im`): a pass's arrays of 256 KB stay in the
#: processor's L2 cache instead of streaming through memory.
PASS_VALUES = 32_768


def state_exceedance(x, medians, betas):
    r"""Probability [-] of reaching or exceeding each damage state, one 2-D array per state.

    Parameters
    ----------
    x : ndarray, shape (n_events, n_pairs) [IM units], non-negative
    medians, betas : ndarray, shape (n_ds,)
        Lognormal fragility of the ordered damage states.

    Returns
    -------
    list of ndarray, each shape (n_events, n_pairs) [-]
        :math:`P^*_j(x) = \max_{l \ge j} \Phi(\ln(x/\theta_l)/\beta_l)`: the values of
        :func:`quakefolio.core.events.portfolio.exceedance_envelope` (bit for bit), state by
        state (no (events, pairs, states) array).
    """
    x = np.asarray(x, dtype=float)
    bad = np.isnan(x) | (x < 0)
    if np.any(bad):
        raise ValueError(f"x must be non-negative and not NaN [IM units], got {x[bad][:3].tolist()}")
    lognormal_fragility(1.0, medians, betas)  # checks medians and betas
    return _state_exceedance(x, np.asarray(medians, dtype=float), np.asarray(betas, dtype=float))


def _state_exceedance(x, theta, b):
    """:func:`state_exceedance` without the checks: ``ndtr(log(x / theta) / beta)`` per state, enveloped."""
    p = []
    with np.errstate(divide="ignore"):
        for j in range(theta.size):  # the operations of quakefolio.core.risk.lognormal_fragility
            q = x / theta[j]
            np.log(q, out=q)
            q /= b[j]
            p.append(special.ndtr(q, out=q))
    for j in range(theta.size - 2, -1, -1):  # upper envelope over the higher states
        np.maximum(p[j + 1], p[j], out=p[j])
    return p


def _fragility_pass(x, medians, betas, mean_damage_ratio, cov, value, deductible, limit, pair):
    """Per-pass arithmetic of :func:`pair_mean_losses` for a class with damage states.

    Returns ``ratio_into(xp, out)`` (the mean loss ratio of the pairs, written into
    ``out``; returns the states' exceedance probabilities) and ``net_of(xp, r, p)``
    (the expected net losses [currency] of the assets given, those with terms).
    """
    mdr, c = check_damage_ratios(mean_damage_ratio, cov)
    inc = np.diff(mdr, axis=-1, prepend=0.0)
    state_exceedance(x[:0], medians, betas)  # checks the fragility once
    if np.any(np.isnan(x) | (x < 0)):
        state_exceedance(x, medians, betas)  # raises, naming the values
    theta, beta = np.asarray(medians, dtype=float), np.asarray(betas, dtype=float)
    if pair.size:  # per asset, not per asset-event
        inc_net = np.diff(net_loss_ratio(mdr, c, value[:, None], deductible[:, None], limit[:, None]), axis=-1,
                          prepend=0.0)

    def ratio_into(xp, out):
        p = _state_exceedance(xp, theta, beta)
        np.multiply(inc[0], p[0], out=out)
        for k in range(1, len(p)):
            out += inc[k] * p[k]
        return p

    def net_of(xp, r, p):
        acc = 0.0
        for k in range(len(p)):
            acc = acc + inc_net[:, k] * p[k][:, pair]
        return value * acc

    return ratio_into, net_of


def _vulnerability_pass(x, table, value, deductible, limit, pair):
    """Per-pass arithmetic of :func:`pair_mean_losses` for a vulnerability class (as :func:`_fragility_pass`).

    The mean loss ratio at the pair's intensity
    (:func:`quakefolio.core.vulnerability.mean_loss_ratio_at`) and, for the assets with
    terms, the expected net loss over the beta loss ratio of that mean and CoV
    (:func:`quakefolio.core.loss.net_loss_ratio`): the values of
    :func:`quakefolio.core.vulnerability.vulnerability_loss_ratios`, elementwise.
    """
    bad = np.isnan(x) | (x < 0)
    if np.any(bad):
        raise ValueError(f"x must be non-negative and not NaN [IM units], got {x[bad][:3].tolist()}")

    def ratio_into(xp, out):
        out[...] = mean_loss_ratio_at(xp, table.levels, table.mean)
        return None

    def net_of(xp, r, _):
        xa = xp[:, pair]
        return value * net_loss_ratio(r[:, pair], cov_at(xa, *table), value, deductible, limit)

    return ratio_into, net_of


def pair_mean_losses(x, medians, betas, mean_damage_ratio, cov, pair, value, deductible, limit, bounds,
                     group_sums=None, assets=None, map_fn=None):
    r"""Mean-mode losses [currency] of one class's assets, summed per (site, class) pair where no terms apply.

    Parameters
    ----------
    x : ndarray, shape (n_events, n_pairs) [IM units]
        Intensity at the class's unique (site, class) pairs.
    medians, betas, mean_damage_ratio, cov : ndarray, shape (n_ds,)
        The class's damage states (:func:`quakefolio.core.events.portfolio.expected_loss_ratios`);
        for a vulnerability class ``medians`` is its
        :class:`~quakefolio.core.vulnerability.VulnerabilityTable` (the others unused).
    pair : ndarray of int, shape (n_assets,)
        Pair of each asset.
    value, deductible, limit : ndarray, shape (n_assets,) [currency]
        Replacement values and per-event terms (NaN: none).
    bounds : sequence of (first row, stop row)
        Rows of each random-number block.
    group_sums : quakefolio.core.events.programme.GroupSums, optional
        Receives the assets' net losses per event, summed by terms group.
    assets : ndarray of int, shape (n_assets,), optional
        The assets' indices in the portfolio (needed with ``group_sums``).
    map_fn : callable, optional
        Ordered map running the random-number blocks (:func:`quakefolio.core.events.threads.block_map`;
        default one thread); each block writes its own rows and sums, so the values do not
        depend on it.

    Returns
    -------
    As :func:`block_loss_sums`.

    Notes
    -----
    In the mean mode the ground-up loss of asset :math:`i` in event :math:`e` is
    :math:`V_i\,r_{e,p(i)}` with :math:`r_{e,p}` the mean loss ratio at its pair's
    intensity: :math:`r_{e,p} = \sum_j (\mu_j - \mu_{j-1}) P^*_j(x_{e,p})` for damage
    states (:func:`quakefolio.core.events.portfolio.expected_loss_ratio`; added state by
    state in order, which is numpy's order for fewer than 8 states), the interpolated
    mean :math:`\mu(x_{e,p})` for a vulnerability class
    (:func:`quakefolio.core.vulnerability.mean_loss_ratio_at`).  So the sums over assets
    and over events factor through the pairs:

    .. math:: \sum_i V_i r_{e,p(i)} = \sum_p r_{e,p} \sum_{i \in p} V_i, \qquad
              \sum_{e \in b} V_i r_{e,p(i)} = V_i \sum_{e \in b} r_{e,p(i)}, \qquad
              \sum_{e \in b} (V_i r_{e,p(i)})^2 = V_i^2 \sum_{e \in b} r_{e,p(i)}^2,

    at a cost per pair instead of per asset.  Assets without terms
    (:func:`quakefolio.core.events.portfolio.has_policy_terms`) have net = ground-up, so
    they enter the net sums the same way; the expected net loss given the intensity
    (closed form, as :func:`quakefolio.core.events.portfolio.expected_loss_ratios` and
    :func:`quakefolio.core.vulnerability.vulnerability_loss_ratios`) is evaluated per
    asset and event only for the assets with terms.  The sums are the same sums in
    another order of addition: equal to those of :func:`block_loss_sums` on the
    per-asset losses to round-off (non-negative terms: relative difference below the
    number of terms times 2^-53, about 1e-13 here; tested to 1e-12).
    """
    terms = has_policy_terms(deductible, limit)
    t = np.flatnonzero(terms)
    money = (value[t], deductible[t], limit[t], pair[t])
    if isinstance(medians, VulnerabilityTable):
        ratio_into, net_of = _vulnerability_pass(x, medians, *money)
    else:
        ratio_into, net_of = _fragility_pass(x, medians, betas, mean_damage_ratio, cov, *money)
    n_pairs = x.shape[1]
    v_all = np.bincount(pair, weights=value, minlength=n_pairs)
    v_free = np.bincount(pair[~terms], weights=value[~terms], minlength=n_pairs) if t.size else v_all
    ratio = np.empty(x.shape)
    gu_ev, net_ev = np.empty(x.shape[0]), np.empty(x.shape[0])
    asset_sum = np.zeros((len(bounds), 2, len(value)))
    asset_sumsq = np.zeros((len(bounds), 2, len(value)))
    total = np.zeros((len(bounds), 2))
    step = max(1, PASS_VALUES // max(1, n_pairs))  # events per pass of the elementwise arithmetic

    def block(j):  # one random-number block: writes its own rows and its own block sums
        lo, hi = bounds[j]
        net = np.empty((hi - lo, t.size))
        for a in range(lo, hi, step):
            xp, r = x[a:min(hi, a + step)], ratio[a:min(hi, a + step)]
            p = ratio_into(xp, r)
            if t.size:  # expected net loss of the assets with terms
                net[a - lo:a - lo + r.shape[0]] = net_of(xp, r, p)
        r = ratio[lo:hi]
        # along each event's row (einsum's own loop, not BLAS): an event's sum does not depend on its chunk
        gu_ev[lo:hi] = np.einsum("ep,p->e", r, v_all)
        net_ev[lo:hi] = np.einsum("ep,p->e", r, v_free) if t.size else gu_ev[lo:hi]
        asset_sum[j, 0] = value * r.sum(axis=0)[pair]
        asset_sumsq[j, 0] = value * value * (r * r).sum(axis=0)[pair]
        asset_sum[j, 1], asset_sumsq[j, 1] = asset_sum[j, 0], asset_sumsq[j, 0]
        if t.size:
            net_ev[lo:hi] += net.sum(axis=1)
            asset_sum[j, 1, t], asset_sumsq[j, 1, t] = net.sum(axis=0), (net * net).sum(axis=0)
            if group_sums is not None:
                with lock:  # the block's own rows: one addition per row and class, in any block order
                    group_sums.add(assets[t], net, rows=slice(lo, hi))
        total[j] = gu_ev[lo:hi].sum(), net_ev[lo:hi].sum()

    lock = threading.Lock()
    (map_fn or serial_map)(block, range(len(bounds)))
    if group_sums is not None:
        group_sums.add_pairs(assets[~terms], pair[~terms], value[~terms], ratio)
        if getattr(group_sums, "ground_up", None) is not None:  # the breakdown's ground-up sums
            group_sums.ground_up.add_pairs(assets, pair, value, ratio)
    return gu_ev, net_ev, asset_sum, asset_sumsq, total


def portfolio_event_losses(im, classes, value, deductible, limit, *, loss_model, seed, blocks, correlation=0.0,
                           group=None, group_sums=None, twin=False, map_fn=None):
    r"""Losses of a portfolio in a chunk of events, class by class.

    Parameters
    ----------
    im : ndarray, shape (n_events, n_ims, n_sites) [g]
        Sampled intensity at the sites (0 beyond the integration distance).
    classes : sequence of (assets, im index, medians, betas, mean damage ratio, cov, sites, pair)
        Per class entry: its asset indices, the IM of its fragility, its damage states,
        its unique sites and the site pair of each of its assets.  A vulnerability class
        gives its :class:`~quakefolio.core.vulnerability.VulnerabilityTable` in place of the
        medians (betas, mean damage ratio and cov unused).
    value, deductible, limit : ndarray, shape (n_assets,) [currency]
    loss_model, seed : as :func:`event_loss_ratio`
    blocks : sequence of (block index, first row, stop row)
        The chunk's random-number blocks.
    correlation : float
        Within-group correlation of sampled damage (:func:`event_loss_ratio`); 0: independent.
    group : ndarray of int, shape (n_assets,), or None
        Group index of each asset (needed when sampling with ``correlation > 0``).
    group_sums : quakefolio.core.events.programme.GroupSums, optional
        Receives every asset's net loss per event, summed by terms group.
    twin : bool
        Sampled damage with ``correlation > 0`` only: the independent twin of those draws
        (the same own uniforms without the group factors; common random numbers,
        :mod:`quakefolio.core.events.secondary`), to measure the correlation's effect.
    map_fn : callable, optional
        Mean mode: ordered map running each class's random-number blocks
        (:func:`pair_mean_losses`); the values do not depend on it.

    Returns
    -------
    event_ground_up, event_net : ndarray, shape (n_events,) [currency]
    asset_sum, asset_sumsq : ndarray, shape (n_blocks, 2, n_assets)
        Per block: sums and sums of squares of each asset's ground-up and net losses.
    class_sum : ndarray, shape (n_blocks, n_classes, 2) [currency]

    Notes
    -----
    Classes are added in their given order.  Mean mode: ground-up from the mean loss
    ratio, net the expected net loss given the intensity (not the terms applied to the
    mean loss), so both are the conditional expectations, given the ground motion, of the
    sampled mode's losses; summed per (site, class) pair (:func:`pair_mean_losses`).
    Sampled mode: per asset and event (:func:`event_loss_ratio`, :func:`block_loss_sums`),
    the terms applied only to the assets that have them, every value and sum bit for bit
    that of the policy applied to all.  The per-asset arrays of a chunk take
    ``8 x events x assets of the class`` bytes each: ``[execution] event_block_size``
    bounds them.
    """
    n_ev = im.shape[0]
    bounds = [(lo, hi) for _, lo, hi in blocks]
    gu_ev = np.zeros(n_ev)
    net_ev = np.zeros(n_ev)
    asset_sum = np.zeros((len(bounds), 2, len(value)))
    asset_sumsq = np.zeros((len(bounds), 2, len(value)))
    class_sum = np.zeros((len(bounds), len(classes), 2))
    shared = loss_model != "mean_damage_ratio" and correlation > 0 and not twin
    factors = group_factors(seed, blocks, int(np.max(group)) + 1 if len(group) else 0) if shared else None
    for k, (assets, i_im, medians, betas, mdr, cov, usites, pair) in enumerate(classes):
        x = im[:, i_im, usites]
        if loss_model == "mean_damage_ratio":  # net: expected over the loss distribution given x
            gu, net, a_sum, a_sumsq, total = pair_mean_losses(
                x, medians, betas, mdr, cov, pair, value[assets], deductible[assets], limit[assets], bounds,
                group_sums, assets, map_fn)
        else:
            gu, net, a_sum, a_sumsq, total = _sampled_class_losses(
                x, (medians, betas, mdr, cov), pair, assets, (value, deductible, limit), blocks, k,
                dict(loss_model=loss_model, seed=seed, correlation=correlation, twin=twin),
                None if factors is None else (factors, group), group_sums)
        gu_ev += gu
        net_ev += net
        asset_sum[:, :, assets] = a_sum
        asset_sumsq[:, :, assets] = a_sumsq
        class_sum[:, k] = total
    return gu_ev, net_ev, asset_sum, asset_sumsq, class_sum


def _sampled_class_losses(x, states, pair, assets, money, blocks, class_entry, draw, shared, group_sums):
    """Sampled-mode losses of one class in a chunk (:func:`event_loss_ratio`, :func:`block_loss_sums`).

    ``shared`` (correlated draws only): the chunk's group factors (:func:`group_factors`) and
    every asset's group.
    """
    value, deductible, limit = (a[assets] for a in money)
    factors = None if shared is None else shared[0][:, shared[1][assets]]
    ratio = event_loss_ratio(x, *states, pair, blocks=blocks, class_entry=class_entry, factors=factors, **draw)
    on_net = None if group_sums is None else (lambda n: group_sums.add(assets, n))
    gu_sums = getattr(group_sums, "ground_up", None)
    on_gu = None if gu_sums is None else (lambda g: gu_sums.add(assets, g))
    return block_loss_sums(ratio, value, deductible, limit, [(lo, hi) for _, lo, hi in blocks], on_net,
                           terms=has_policy_terms(deductible, limit), on_ground_up=on_gu)


def exceedance_counts(ln_im, levels_g):
    r"""Number of events whose intensity exceeds each level, per IM and site.

    Parameters
    ----------
    ln_im : ndarray, shape (n_events, n_ims, n_sites) [ln g]
    levels_g : array_like, shape (n_levels,) [g]

    Returns
    -------
    ndarray of int, shape (n_ims, n_sites, n_levels)
        Divided by the simulated years, the event-based hazard curve (common practice).
    """
    ln_levels = np.log(levels_g)
    out = np.empty((ln_im.shape[1], ln_im.shape[2], ln_levels.size), dtype=np.int64)
    for i in range(ln_im.shape[1]):
        for k, level in enumerate(ln_levels):  # 2-D comparisons: no (events, sites, levels) array
            out[i, :, k] = np.count_nonzero(ln_im[:, i, :] > level, axis=0)
    return out


def sum_over_blocks(parts):
    """Sum over random-number blocks of per-block arrays gathered from several chunks.

    Parameters
    ----------
    parts : sequence of ndarray, shape (n_blocks_i, ...)
        Per-chunk block sums, in block order.

    Returns
    -------
    ndarray, shape (...)
        ``concatenate(parts).sum(axis=0)``: the same order of addition whatever the chunking.
    """
    return np.concatenate(parts).sum(axis=0)


def annual_average_by(index, loss, n_groups, n_years):
    r"""Average annual loss [currency/yr] per group (e.g. per seismic source) of an event loss table.

    Parameters
    ----------
    index : ndarray of int, shape (n_events,)
        Group of each event.
    loss : ndarray, shape (n_events,) [currency]
    n_groups : int
    n_years : int
        Simulated years.

    Returns
    -------
    ndarray, shape (n_groups,) [currency/yr]
        :math:`\frac{1}{N}\sum_{e \in g} L_e`.
    """
    return np.bincount(index, weights=loss, minlength=n_groups) / n_years


# --------------------------------------------------------------------------- checks against the classical model


def asset_aal_statistics(asset_sum, asset_sumsq, n_years, classical):
    r"""Per-asset AAL [currency/yr] of the simulation, its standard error and z-score vs the classical EAL.

    Parameters
    ----------
    asset_sum : ndarray, shape (2, n_assets) [currency]
        Ground-up and net losses of each asset summed over all events.
    asset_sumsq : ndarray, shape (2, n_assets) [currency^2]
        Sums of squares of the same.
    n_years : int
        Simulated years :math:`N`.
    classical : ndarray, shape (n_assets,) [currency/yr]
        Classical EAL of the same model.

    Returns
    -------
    aal_ground_up, aal_net, standard_error, z_score : ndarray, shape (n_assets,)
        ``z_score`` is :math:`(\bar L - EAL)/se`; where :math:`se = 0`, 0 if the two agree
        to 1e-9 relative and ``inf`` otherwise.

    Notes
    -----
    Compound Poisson: the variance of the annual loss is the sum over event types of
    rate x :math:`E[L^2]`, estimated by :math:`\sum_e L_e^2 / N`, so
    :math:`se = \sqrt{\sum_e L_e^2}/N` (common practice).
    """
    aal_gu = asset_sum[0] / n_years
    aal_net = asset_sum[1] / n_years
    se = np.sqrt(asset_sumsq[0]) / n_years
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, (aal_gu - classical) / se,
                     np.where(np.abs(aal_gu - classical) <= 1e-9 * (1 + classical), 0.0, np.inf))
    return aal_gu, aal_net, se, z


def aal_cross_check(asset_sum_ground_up, asset_sumsq_ground_up, n_years, classical, year_ground_up,
                    standard_error=None):
    r"""Event-based AAL against the classical EAL of the same model, per asset and in total.

    Parameters
    ----------
    asset_sum_ground_up, asset_sumsq_ground_up : ndarray, shape (n_assets,)
        Per-asset sums [currency] and sums of squares [currency^2] over all events.
    n_years : int
    classical : ndarray, shape (n_assets,) [currency/yr]
    year_ground_up : ndarray, shape (n_years,) [currency]
        Annual portfolio losses.
    standard_error : float, optional
        Standard error of the portfolio AAL [currency/yr] to use instead of the one of
        the year losses (e.g. the compound-Poisson one of years stratified by logic-tree
        branch).

    Returns
    -------
    dict
        ``assets``, ``within_3_standard_errors``, ``share_within_3_standard_errors``,
        ``max_abs_z`` (z = 0 where the standard error is 0), and for the portfolio
        ``event_based_aal``, ``standard_error``, ``classical_eal``, ``z``, ``passed``
        (within 3 standard errors; :func:`aal_with_standard_error`).
    """
    aal = asset_sum_ground_up / n_years
    se = np.sqrt(asset_sumsq_ground_up) / n_years
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, (aal - classical) / se, 0.0)
    total_aal, total_se = aal_with_standard_error(year_ground_up)
    if standard_error is not None:
        total_se = float(standard_error)
    total_cl = float(classical.sum())
    return {
        "assets": int(len(aal)), "within_3_standard_errors": int(np.sum(np.abs(z) <= 3)),
        "share_within_3_standard_errors": float(np.mean(np.abs(z) <= 3)) if len(z) else 1.0,
        "max_abs_z": float(np.max(np.abs(z))) if len(z) else 0.0,
        "event_based_aal": float(total_aal), "standard_error": float(total_se), "classical_eal": total_cl,
        "z": float((total_aal - total_cl) / total_se) if total_se > 0 else 0.0,
        "passed": bool(abs(total_aal - total_cl) <= 3 * total_se),
    }


def event_hazard_cross_check(exceed_counts, classical_curves, n_years):
    r"""Event-based exceedance rates against the classical hazard curves.

    Parameters
    ----------
    exceed_counts : ndarray, shape (n_ims, n_sites, n_levels)
        Events exceeding each level (:func:`exceedance_counts`).
    classical_curves : ndarray, same shape [1/yr]
    n_years : int

    Returns
    -------
    dict
        ``compared_points``, ``within_3_standard_errors``, ``share_within_3_standard_errors``,
        ``max_abs_z``, ``rate_threshold_per_yr``.

    Notes
    -----
    Rate of events with IM > x is counts / N; compared where the classical rate is above
    10/N, with the Poisson standard error :math:`\sqrt{\lambda/N}` (common practice).
    """
    rate_eb = exceed_counts / n_years
    ok = classical_curves > 10.0 / n_years
    with np.errstate(divide="ignore", invalid="ignore"):
        zh = np.where(ok, (rate_eb - classical_curves) / np.sqrt(classical_curves / n_years), 0.0)
    return {
        "compared_points": int(ok.sum()), "within_3_standard_errors": int(np.sum(np.abs(zh[ok]) <= 3)),
        "share_within_3_standard_errors": float(np.mean(np.abs(zh[ok]) <= 3)) if ok.any() else 1.0,
        "max_abs_z": float(np.max(np.abs(zh[ok]))) if ok.any() else 0.0,
        "rate_threshold_per_yr": 10.0 / n_years,
    }
