r"""Programme terms above the building: group (policy or account) terms and portfolio layers.

The event-based stage gives, for every simulated event, each building's **net** loss
after its own deductible and limit
(:func:`quakefolio.core.events.portfolio.apply_policy`).  This module carries that loss
up the insurance programme, per event and per simulated year:

1. **Group terms.**  Buildings may belong to a terms group (a policy or an account: the
   exposure column ``terms_group``).  Per event, the group's loss is the sum of its
   buildings' net losses, and the group's own deductible :math:`D_g` and limit
   :math:`U_g` apply to that sum:
   :math:`G_{g,e} = \min(\max(\sum_{i \in g} N_{i,e} - D_g, 0), U_g)`
   (:class:`GroupSums`, :func:`apply_group_terms`).
2. **Programme loss.**  The portfolio loss that enters the layers is
   :math:`P_e = \sum_g G_{g,e}`: the portfolio net loss of the event after building
   and group terms (without group terms, the portfolio net loss after building terms).
3. **Occurrence layers** (per event; attachment :math:`a`, limit :math:`l`,
   reinstatements :math:`r`): each event pays :math:`x_e = \min(\max(P_e - a, 0), l)`;
   the payout of a year is capped at :math:`l\,(1 + r)` (the original limit and
   :math:`r` reinstatements of it; unlimited reinstatements: no cap), so a year pays
   :math:`Y_y = \min(\sum_{e \in y} x_e,\ l(1 + r))`
   (:func:`occurrence_layer_losses`).  The cap is spent in event-set order within the
   year (year, then rupture: the event set simulates no time within a year); the
   year's payout, and so every annual statistic, does not depend on that order.
   Reinstatement premiums are not modelled.
4. **Aggregate layers** (per year; aggregate attachment :math:`A` and limit :math:`U`)
   on the annual sum of the programme loss: :math:`Y_y = \min(\max(\sum_{e \in y} P_e - A,
   0), U)` (:func:`aggregate_layer_losses`).
5. **Statistics** of a layer over :math:`N` simulated years (:func:`layer_statistics`):
   expected annual layer loss with its standard error, probability of attachment (a
   year in which the layer pays), probability of exhaustion (a year in which one event,
   or the annual sum for an aggregate layer, uses the whole limit), probability that
   the annual cap is used up, and the layer's EP values at return periods (same
   empirical estimators as the portfolio, :mod:`quakefolio.core.events.portfolio`).

All payoffs are taken event by event and year by year over the simulated loss
distribution; no term is applied to an expected loss.  In the ``mean_damage_ratio``
loss model, however, the event loss of a building is its expected loss *given the
sampled ground motion*: group terms and layers then see the ground-motion variability
but not the damage and loss-ratio uncertainty given the shaking.  The sampled loss
model carries both.

Terms are the usual trade conventions (common practice): a layer ":math:`l` xs
:math:`a`" pays the part of the loss above the attachment up to the limit; reinstated
limit :math:`l(1 + r)` per year (e.g. Grossi & Kunreuther 2005, Ch. 2 on EP curves;
the layer payoff and reinstatement cap are common practice).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from quakefolio.core.events.portfolio import (
    aal_with_standard_error, apply_policy, ep_from_years, tvar, year_loss,
)

__all__ = [
    "GroupTerms", "GroupSums", "apply_group_terms", "block_group_sums", "chunk_programme_loss",
    "Layer", "layer_payout", "occurrence_layer_losses", "aggregate_layer_losses", "layer_statistics",
    "evaluate_layers",
]


# --------------------------------------------------------------------------- group terms


@dataclass(frozen=True)
class GroupTerms:
    """Terms groups of a portfolio (read-only).

    Attributes
    ----------
    ids : tuple of str, length n_groups
        Group names, in sorted order.
    group_of_asset : ndarray of int, shape (n_assets,)
        Index into ``ids`` of each asset's group.
    deductible, limit : ndarray, shape (n_groups,) [currency]
        Per-event group terms; NaN: none (:func:`apply_policy`).
    """

    ids: tuple
    group_of_asset: np.ndarray
    deductible: np.ndarray
    limit: np.ndarray


class GroupSums:
    r"""Per-event sums of building net losses by terms group, filled class by class.

    Parameters
    ----------
    group_of_asset : ndarray of int, shape (n_assets,)
        Group index of each asset in ``0..n_groups-1``.
    n_groups : int
    n_events : int
        Events of the chunk.

    Attributes
    ----------
    total : ndarray, shape (n_events, n_groups) [currency]
        :math:`\sum_{i \in g} N_{i,e}` over the assets added so far.

    Notes
    -----
    Within a class the assets are summed per group by ``np.add.reduceat`` over the
    assets sorted by group (stable sort): the order of addition depends only on the
    class order and the asset order, never on the chunking of events.
    """

    def __init__(self, group_of_asset, n_groups, n_events):
        self.group_of_asset = np.asarray(group_of_asset, dtype=np.int64)
        self.total = np.zeros((n_events, n_groups))

    def add(self, assets, net, rows=slice(None)):
        """Add the net losses ``net`` [currency], shape (n_rows, len(assets)), of ``assets`` to events ``rows``."""
        if not len(assets):
            return
        g = self.group_of_asset[assets]
        order = np.argsort(g, kind="stable")
        gs = g[order]
        starts = np.flatnonzero(np.r_[True, gs[1:] != gs[:-1]])
        self.total[rows, gs[starts]] += np.add.reduceat(net[:, order], starts, axis=1)

    def add_pairs(self, assets, pair, value, ratio):
        r"""Add losses :math:`V_i\,r_{e,p(i)}` [currency] of ``assets`` given per (site, class) pair.

        Parameters
        ----------
        assets : ndarray of int, shape (n,)
            The assets (whose net loss is their ground-up loss).
        pair : ndarray of int, shape (n,)
            Pair of each asset (column of ``ratio``).
        value : ndarray, shape (n,) [currency]
        ratio : ndarray, shape (n_events, n_pairs) [-]
            Loss ratio of each pair in every event of the chunk.

        Notes
        -----
        :math:`\sum_{i \in g} V_i r_{e,p(i)} = \sum_{p \in g} r_{e,p} W_{p,g}` with
        :math:`W_{p,g}` the value of the assets of pair p in group g: a sum over the pairs
        of each group instead of over its assets (another order of addition than
        :meth:`add`; equal to round-off).  Summed along each event's row, so an event's
        sum does not depend on the other events of the chunk.
        """
        if not len(assets):
            return
        key = np.unique(np.asarray(self.group_of_asset[assets], dtype=np.int64) * ratio.shape[1] + pair,
                        return_inverse=True)
        w = np.bincount(key[1].ravel(), weights=value)  # value per (group, pair), sorted by group then pair
        group, col = np.divmod(key[0], ratio.shape[1])
        starts = np.flatnonzero(np.r_[True, group[1:] != group[:-1]])
        for lo, hi in zip(starts, np.r_[starts[1:], group.size]):
            self.total[:, group[lo]] += (ratio[:, col[lo:hi]] * w[lo:hi]).sum(axis=1)


def apply_group_terms(group_net, deductible, limit):
    r"""Group loss [currency] per event after the group's deductible and limit.

    Parameters
    ----------
    group_net : ndarray, shape (n_events, n_groups) [currency]
        Sum of the group's building net losses in each event (:class:`GroupSums`).
    deductible, limit : ndarray, shape (n_groups,) [currency]
        Per-event group terms, NaN: none.

    Returns
    -------
    ndarray, shape (n_events, n_groups) [currency]
        :math:`\min(\max(S - D_g, 0), U_g)` (:func:`apply_policy`).
    """
    return apply_policy(np.maximum(group_net, 0.0), deductible, limit)


def block_group_sums(before, after, bounds):
    """Sums over each random-number block's events of group losses before and after group terms.

    Parameters
    ----------
    before, after : ndarray, shape (n_events, n_groups) [currency]
    bounds : sequence of (first row, stop row)

    Returns
    -------
    ndarray, shape (n_blocks, 2, n_groups) [currency]
    """
    out = np.zeros((len(bounds), 2, before.shape[1]))
    for j, (lo, hi) in enumerate(bounds):
        out[j, 0], out[j, 1] = before[lo:hi].sum(axis=0), after[lo:hi].sum(axis=0)
    return out


def chunk_programme_loss(group_terms, group_sums, net, bounds):
    r"""Programme loss per event of a chunk, and per-block group sums.

    Parameters
    ----------
    group_terms : GroupTerms or None
    group_sums : GroupSums or None
        Filled by :func:`quakefolio.core.events.losses.portfolio_event_losses`.
    net : ndarray, shape (n_events,) [currency]
        Portfolio net loss after building terms.
    bounds : sequence of (first row, stop row)

    Returns
    -------
    programme : ndarray, shape (n_events,) [currency]
        :math:`P_e = \sum_g G_{g,e}` (``net`` itself without group terms).
    group_sum : ndarray, shape (n_blocks, 2, n_groups) [currency] or None
        Before and after group terms (:func:`block_group_sums`).
    """
    if group_terms is None:
        return net, None
    after = apply_group_terms(group_sums.total, group_terms.deductible, group_terms.limit)
    return after.sum(axis=1), block_group_sums(group_sums.total, after, bounds)


# --------------------------------------------------------------------------- layers


@dataclass(frozen=True)
class Layer:
    """One layer of the programme.

    Attributes
    ----------
    id : str
    kind : {"occurrence", "aggregate"}
        Per event (occurrence) or on the annual sum (aggregate).
    attachment : float [currency], >= 0
    limit : float [currency], > 0 (``inf``: unlimited)
    reinstatements : int or None
        Occurrence layers: reinstatements of the limit per year (None: unlimited);
        always None for aggregate layers.
    """

    id: str
    kind: str
    attachment: float
    limit: float
    reinstatements: int | None = None

    @property
    def annual_cap(self):
        """Largest payout of a year [currency]: ``limit x (1 + reinstatements)``, ``limit`` for aggregate layers."""
        if self.kind == "aggregate":
            return float(self.limit)
        return float("inf") if self.reinstatements is None else float(self.limit) * (1 + self.reinstatements)


def _check_terms(attachment, limit):
    if not (np.isfinite(attachment) and attachment >= 0):
        raise ValueError(f"attachment must be finite and >= 0 [currency], got {attachment!r}")
    if not (limit > 0):
        raise ValueError(f"limit must be > 0 [currency] (inf: unlimited), got {limit!r}")


def layer_payout(loss, attachment, limit):
    r"""Loss to a layer ":math:`l` xs :math:`a`" [currency]: :math:`\min(\max(L - a, 0), l)`.

    Parameters
    ----------
    loss : array_like [currency], non-negative
    attachment : float [currency], >= 0
    limit : float [currency], > 0 (``inf``: unlimited)

    Returns
    -------
    ndarray, shape of ``loss`` [currency]
    """
    _check_terms(attachment, limit)
    return np.minimum(np.maximum(np.asarray(loss, dtype=float) - attachment, 0.0), limit)


def occurrence_layer_losses(event_year, loss, n_years, attachment, limit, reinstatements=None):
    r"""Loss to a per-event layer, per event and per year, with the annual reinstatement cap.

    Parameters
    ----------
    event_year : ndarray of int, shape (n_events,)
        Year of each event in ``1..n_years``, events in event-set order (years
        non-decreasing).
    loss : ndarray, shape (n_events,) [currency]
        Loss entering the layer (the programme loss :math:`P_e`).
    n_years : int
    attachment, limit : float [currency]
        :func:`layer_payout`.
    reinstatements : int >= 0 or None
        None: unlimited (no annual cap).

    Returns
    -------
    event_paid : ndarray, shape (n_events,) [currency]
        Each event's loss to the layer after the annual cap.
    event_uncapped : ndarray, shape (n_events,) [currency]
        :math:`x_e = \min(\max(P_e - a, 0), l)`.
    year_paid : ndarray, shape (n_years,) [currency]
        :math:`\min(\sum_{e \in y} x_e, l(1 + r))`.
    year_uncapped : ndarray, shape (n_years,) [currency]
        :math:`\sum_{e \in y} x_e`.

    Notes
    -----
    Years whose uncapped sum stays within the cap pay every event in full; in the
    others the cap is spent in event order and the event that reaches it is paid the
    remainder (its later events pay 0).  The annual payout equals the cap exactly there.
    """
    _check_terms(attachment, limit)
    if reinstatements is not None and (int(reinstatements) != reinstatements or reinstatements < 0):
        raise ValueError(f"reinstatements must be an integer >= 0 or None, got {reinstatements!r}")
    year = np.asarray(event_year, dtype=np.int64)
    x = layer_payout(loss, attachment, limit)
    year_uncapped, _ = year_loss(year, x, n_years)
    paid = x.copy()
    year_paid = year_uncapped.copy()
    if reinstatements is not None:
        cap = float(limit) * (1 + int(reinstatements))
        over = np.flatnonzero(year_uncapped > cap) + 1
        if over.size:
            lo = np.searchsorted(year, over, side="left")
            hi = np.searchsorted(year, over, side="right")
            for a, b in zip(lo, hi):
                remaining = cap
                for e in range(a, b):
                    paid[e] = min(x[e], remaining)
                    remaining -= paid[e]
            year_paid[over - 1] = cap
    return paid, x, year_paid, year_uncapped


def aggregate_layer_losses(annual_loss, attachment, limit):
    r"""Loss to an aggregate layer per year [currency]: :math:`\min(\max(\sum_{e \in y} P_e - A, 0), U)`.

    Parameters
    ----------
    annual_loss : ndarray, shape (n_years,) [currency]
        Annual sum of the programme loss.
    attachment, limit : float [currency]
        Aggregate attachment and limit (:func:`layer_payout`).

    Returns
    -------
    ndarray, shape (n_years,) [currency]
    """
    return layer_payout(annual_loss, attachment, limit)


def layer_statistics(year_paid, attached, exhausted, cap_used, return_periods_yr, year_max_event=None):
    r"""Annual statistics of one layer over N simulated years.

    Parameters
    ----------
    year_paid : ndarray, shape (n_years,) [currency]
        Annual loss to the layer.
    attached, exhausted : ndarray of bool, shape (n_years,)
        Years in which the layer pays (the loss exceeds the attachment) and years in which
        one event (occurrence layer) or the annual sum (aggregate layer) reaches
        attachment + limit.
    cap_used : ndarray of bool, shape (n_years,) or None
        Years whose uncapped payout reaches the annual cap (None: no finite cap).
    return_periods_yr : array_like, shape (R,) [yr]
    year_max_event : ndarray, shape (n_years,) [currency], optional
        Largest single-event payout of each year (occurrence layers; OEP basis).

    Returns
    -------
    dict
        ``expected_annual_loss`` and ``standard_error`` [currency/yr]
        (:func:`aal_with_standard_error`), ``prob_attachment``, ``prob_exhaustion``,
        ``prob_annual_cap_used`` (NaN without a cap) [-]: counts of years / N;
        ``aep``, ``oep`` (NaN without ``year_max_event``), ``tvar`` [currency], shape (R,).
    """
    n = len(year_paid)
    rps = np.asarray(return_periods_yr, dtype=float)
    if n >= 2:
        mean, se = (float(v) for v in aal_with_standard_error(year_paid))
    else:
        mean, se = float(np.mean(year_paid)), float("nan")
    return {
        "expected_annual_loss": mean, "standard_error": se,
        "prob_attachment": float(np.count_nonzero(attached)) / n,
        "prob_exhaustion": float(np.count_nonzero(exhausted)) / n,
        "prob_annual_cap_used": float("nan") if cap_used is None else float(np.count_nonzero(cap_used)) / n,
        "aep": ep_from_years(year_paid, rps), "tvar": tvar(year_paid, rps),
        "oep": np.full(rps.shape, np.nan) if year_max_event is None else ep_from_years(year_max_event, rps),
    }


def evaluate_layers(event_year, loss, n_years, layers, return_periods_yr):
    r"""Every layer of a programme on one event loss table.

    Parameters
    ----------
    event_year : ndarray of int, shape (n_events,)
        Year of each event (event-set order).
    loss : ndarray, shape (n_events,) [currency]
        Programme loss :math:`P_e`: the portfolio net loss of each event after building and
        group terms.
    n_years : int
    layers : sequence of Layer
    return_periods_yr : array_like [yr]

    Returns
    -------
    list of dict, one per layer
        ``layer``; ``event_paid``, ``event_uncapped`` (occurrence layers; None for
        aggregate); ``year_paid``, ``year_entering`` (annual maximum event loss for
        occurrence layers, annual sum for aggregate layers) [currency], and the
        statistics of :func:`layer_statistics`.
    """
    year = np.asarray(event_year, dtype=np.int64)
    loss = np.asarray(loss, dtype=float)
    annual, annual_max = year_loss(year, loss, n_years)
    out = []
    for layer in layers:
        top = layer.attachment + layer.limit
        if layer.kind == "occurrence":
            paid, x, year_paid, year_uncapped = occurrence_layer_losses(
                year, loss, n_years, layer.attachment, layer.limit, layer.reinstatements)
            max_paid = year_loss(year, paid, n_years)[1]
            cap = layer.annual_cap
            stats = layer_statistics(year_paid, annual_max > layer.attachment, annual_max >= top,
                                     None if np.isinf(cap) else year_uncapped >= cap, return_periods_yr, max_paid)
            out.append({"layer": layer, "event_paid": paid, "event_uncapped": x, "year_paid": year_paid,
                        "year_entering": annual_max, **stats})
        else:
            year_paid = aggregate_layer_losses(annual, layer.attachment, layer.limit)
            stats = layer_statistics(year_paid, annual > layer.attachment, annual >= top,
                                     annual >= top, return_periods_yr)
            out.append({"layer": layer, "event_paid": None, "event_uncapped": None, "year_paid": year_paid,
                        "year_entering": annual, **stats})
    return out
