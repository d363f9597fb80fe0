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
   (:func:`quakefolio.core.events.portfolio.expected_loss_ratios`, closed form).
2. **Sums per random-number block** (per event, per asset, per class), so that totals do
   not depend on how blocks are grouped into tasks.
3. **Statistics of the simulation**: per-asset AAL with its compound-Poisson standard
   error, per-group averages, event-based exceedance rates.
4. **Cross-checks** against the classical results of the same model: z-scores of the
   event-based AAL against the classical EAL (per asset and for the portfolio), and of
   the event-based exceedance rates against the classical hazard curves.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.events.eventset import damage_block_rng
from quakefolio.core.events.portfolio import (
    aal_with_standard_error, apply_policy, expected_loss_ratio, expected_loss_ratios,
)
from quakefolio.core.events.secondary import correlated_uniform, group_factors, sample_correlated_loss_ratio
from quakefolio.core.vulnerability import (
    VulnerabilityTable, mean_loss_ratio_at, vulnerability_loss_ratios, vulnerability_quantile,
)

__all__ = [
    "event_loss_ratio",
    "block_loss_sums",
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


def block_loss_sums(ratio, value, deductible, limit, bounds, on_net=None, net=None):
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
    Loss = ratio x value; net = :func:`apply_policy` unless given.  Sums are kept per
    random-number block so that totals do not depend on how blocks are grouped into tasks.
    """
    gu = ratio * value
    if net is None:
        net = apply_policy(gu, deductible, limit)
    if on_net is not None:
        on_net(net)
    n_assets = gu.shape[1]
    asset_sum = np.zeros((len(bounds), 2, n_assets))
    asset_sumsq = np.zeros((len(bounds), 2, n_assets))
    total = np.zeros((len(bounds), 2))
    for j, (lo, hi) in enumerate(bounds):
        g, n = gu[lo:hi], net[lo:hi]
        asset_sum[j, 0], asset_sum[j, 1] = g.sum(axis=0), n.sum(axis=0)
        asset_sumsq[j, 0], asset_sumsq[j, 1] = (g * g).sum(axis=0), (n * n).sum(axis=0)
        total[j] = g.sum(), n.sum()
    return gu.sum(axis=1), net.sum(axis=1), asset_sum, asset_sumsq, total


def portfolio_event_losses(im, classes, value, deductible, limit, *, loss_model, seed, blocks, correlation=0.0,
                           group=None, group_sums=None, twin=False):
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

    Returns
    -------
    event_ground_up, event_net : ndarray, shape (n_events,) [currency]
    asset_sum, asset_sumsq : ndarray, shape (n_blocks, 2, n_assets)
        Per block: sums and sums of squares of each asset's ground-up and net losses.
    class_sum : ndarray, shape (n_blocks, n_classes, 2) [currency]

    Notes
    -----
    Classes are added in their given order (:func:`event_loss_ratio`,
    :func:`block_loss_sums`).  Mean mode: ground-up from the mean loss ratio, net the
    expected net loss given the intensity (not the terms applied to the mean loss), so
    both are the conditional expectations, given the ground motion, of the sampled
    mode's losses.
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
        net_k = None
        if loss_model == "mean_damage_ratio":  # net: expected over the loss distribution given x
            if isinstance(medians, VulnerabilityTable):
                ratio, net_ratio = vulnerability_loss_ratios(x, *medians, value[assets], deductible[assets],
                                                             limit[assets], pair=pair)
            else:
                ratio, net_ratio = expected_loss_ratios(x, medians, betas, mdr, cov, value[assets],
                                                        deductible[assets], limit[assets], pair=pair)
            net_k = value[assets] * net_ratio
        else:
            ratio = event_loss_ratio(x, medians, betas, mdr, cov, pair, loss_model=loss_model,
                                     seed=seed, blocks=blocks, class_entry=k, correlation=correlation,
                                     factors=None if factors is None else factors[:, group[assets]], twin=twin)
        on_net = None if group_sums is None else (lambda n, a=assets: group_sums.add(a, n))
        gu, net, a_sum, a_sumsq, total = block_loss_sums(ratio, value[assets], deductible[assets], limit[assets],
                                                         bounds, on_net, net=net_k)
        gu_ev += gu
        net_ev += net
        asset_sum[:, :, assets] = a_sum
        asset_sumsq[:, :, assets] = a_sumsq
        class_sum[:, k] = total
    return gu_ev, net_ev, asset_sum, asset_sumsq, class_sum


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
    return np.stack([(ln_im[:, i, :, None] > ln_levels).sum(axis=0) for i in range(ln_im.shape[1])])


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
