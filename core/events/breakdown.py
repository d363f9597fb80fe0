"""Per-event portfolio losses broken down by the groups of exposure columns (district, account ...).

The loss kernels (:func:`quakefolio.core.events.losses.portfolio_event_losses`) hand every
class's per-event losses to a receiver of group sums; :class:`BreakdownSums` is such a
receiver for several grouping columns at once, of ground-up and net losses, and
:class:`LossHooks` forwards the kernel's calls to it and to the terms groups of the
programme.  The sums are the same per-event sums the portfolio totals are made of, in
another order of addition (equal to round-off); the year losses, PML and TVaR of each group
are then those of :mod:`quakefolio.core.events.portfolio` on the group's own event losses.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.events.programme import GroupSums

__all__ = ["BreakdownSums", "LossHooks", "group_year_losses"]


class _Fan:
    """Forwards ``add`` and ``add_pairs`` to several :class:`~quakefolio.core.events.programme.GroupSums`."""

    def __init__(self, receivers):
        self.receivers = tuple(r for r in receivers if r is not None)

    def add(self, assets, loss, rows=slice(None)):
        for r in self.receivers:
            r.add(assets, loss, rows=rows)

    def add_pairs(self, assets, pair, value, ratio):
        for r in self.receivers:
            r.add_pairs(assets, pair, value, ratio)


class BreakdownSums:
    r"""Per-event ground-up and net losses [currency] summed by the groups of several columns.

    Parameters
    ----------
    groups : sequence of (ndarray of int, int)
        Per grouping column: the group index of every asset (shape (n_assets,)) and the
        number of groups.
    n_events : int
        Events of the chunk.

    Attributes
    ----------
    net, ground_up : list of GroupSums
        One per column; ``total`` has shape (n_events, n_groups) [currency].

    Notes
    -----
    For a column with groups :math:`g`, :math:`S_{g,e} = \sum_{i \in g} L_{i,e}` with
    :math:`L_{i,e}` the loss of asset :math:`i` in event :math:`e` (common practice:
    an event loss table per segment of the portfolio).  Each asset belongs to exactly one
    group per column, so the groups of a column sum to the portfolio's event loss.
    """

    def __init__(self, groups, n_events):
        self.net = [GroupSums(g, n, n_events) for g, n in groups]
        self.ground_up = [GroupSums(g, n, n_events) for g, n in groups]

    def result(self):
        """``(ground_up, net)``: per column, the (n_events, n_groups) sums [currency]."""
        return tuple(s.total for s in self.ground_up), tuple(s.total for s in self.net)


class LossHooks:
    """The receiver of group sums handed to the loss kernels: net losses to the terms groups and the
    breakdown, ground-up losses to the breakdown (:attr:`ground_up`).

    Parameters
    ----------
    terms : GroupSums or None
        Net losses by terms group (the programme), or None.
    breakdown : BreakdownSums or None
    """

    def __init__(self, terms, breakdown):
        nets = [terms] + (list(breakdown.net) if breakdown is not None else [])
        self._net = _Fan(nets)
        self.ground_up = _Fan(breakdown.ground_up) if breakdown is not None else None

    def add(self, assets, net, rows=slice(None)):
        """Net losses [currency], shape (n_rows, len(assets)), of ``assets`` in events ``rows``."""
        self._net.add(assets, net, rows=rows)

    def add_pairs(self, assets, pair, value, ratio):
        """Net losses given per (site, class) pair (:meth:`GroupSums.add_pairs`)."""
        self._net.add_pairs(assets, pair, value, ratio)


def group_year_losses(event_year, loss, n_years):
    """Aggregate and largest event loss of each year per group (as :func:`~quakefolio.core.events.portfolio.year_loss`).

    Parameters
    ----------
    event_year : ndarray of int, shape (n_events,)
        Year 1..N of each event.
    loss : ndarray, shape (n_events, n_groups) [currency]
    n_years : int

    Returns
    -------
    aggregate, largest : ndarray, shape (n_groups, n_years) [currency]
    """
    from quakefolio.core.events.portfolio import year_loss

    agg = np.empty((loss.shape[1], n_years))
    occ = np.empty((loss.shape[1], n_years))
    for g in range(loss.shape[1]):
        agg[g], occ[g] = year_loss(event_year, np.ascontiguousarray(loss[:, g]), n_years)
    return agg, occ
