"""The event stage's breakdown by exposure column (``[output] breakdown_columns``): the groups of each
column, the per-event sums of a chunk and the ``breakdown_ep`` table (AAL, PML and TVaR per group)."""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.events.breakdown import BreakdownSums, LossHooks, group_year_losses
from quakefolio.core.events.portfolio import aal_with_standard_error, ep_from_years, tvar

__all__ = ["breakdown_groups", "chunk_hooks", "breakdown_ep_table"]


def breakdown_groups(exposure, columns):
    """The groups of every breakdown column.

    Parameters
    ----------
    exposure : pandas.DataFrame
        The validated exposure, holding ``columns``.
    columns : sequence of str
        ``[output] breakdown_columns``.

    Returns
    -------
    tuple of (str, tuple of str, ndarray of int)
        Per column: its name, its sorted distinct values and each asset's index into them.
    """
    out = []
    for col in columns:
        names, group = np.unique(exposure[col].astype(str).to_numpy(dtype=object), return_inverse=True)
        out.append((col, tuple(str(n) for n in names), group.astype(np.int64).ravel()))
    return tuple(out)


def chunk_hooks(breakdown, terms_sums, n_events):
    """The receiver of group sums for the loss kernels of one chunk, and the breakdown sums.

    Parameters
    ----------
    breakdown : tuple
        :func:`breakdown_groups` (empty: no breakdown).
    terms_sums : quakefolio.core.events.programme.GroupSums or None
        Net losses by terms group (programme), or None.
    n_events : int
        Events of the chunk.

    Returns
    -------
    hooks : GroupSums, LossHooks or None
        What :func:`quakefolio.core.events.losses.portfolio_event_losses` takes as ``group_sums``.
    sums : BreakdownSums or None
    """
    if not breakdown:
        return terms_sums, None
    sums = BreakdownSums([(g, len(names)) for _, names, g in breakdown], n_events)
    return LossHooks(terms_sums, sums), sums


def breakdown_ep_table(breakdown, parts, event_year, n_years, return_periods_yr):
    """``breakdown_ep``: per breakdown column, group and basis, the AAL and the PML and TVaR at each return period.

    Parameters
    ----------
    breakdown : tuple
        :func:`breakdown_groups`.
    parts : list of (tuple, tuple)
        Per chunk in event order, :meth:`BreakdownSums.result`: per column the (n_events, n_groups)
        ground-up and net sums [currency].
    event_year : ndarray of int, shape (n_events,)
    n_years : int
    return_periods_yr : ndarray [yr]

    Returns
    -------
    pandas.DataFrame
        ``breakdown_column``, ``group``, ``basis``, ``n_assets``, ``aal`` [currency/yr],
        ``return_period_yr`` [yr], ``aep_loss``, ``oep_loss``, ``tvar_loss`` [currency].

    Notes
    -----
    Each group's own event losses give its year losses, and from them its AAL (mean of the
    year losses), its PML on the aggregate (AEP) and occurrence (OEP) curves and its TVaR with
    the estimators of the portfolio (:func:`quakefolio.core.events.portfolio.ep_from_years`,
    :func:`~quakefolio.core.events.portfolio.tvar`).  PML and TVaR are not additive: the groups'
    PMLs do not sum to the portfolio's (diversification); their AALs do.
    """
    rows = []
    rps = np.asarray(return_periods_yr, dtype=float)
    for k, (col, names, group) in enumerate(breakdown):
        counts = np.bincount(group, minlength=len(names))
        for b, basis in enumerate(("ground_up", "net")):
            loss = np.concatenate([p[b][k] for p in parts]) if parts else np.zeros((0, len(names)))
            agg, occ = group_year_losses(event_year, loss, n_years)
            for g, name in enumerate(names):
                rows.append(pd.DataFrame({
                    "breakdown_column": col, "group": name, "basis": basis, "n_assets": int(counts[g]),
                    "aal": aal_with_standard_error(agg[g])[0], "return_period_yr": rps,
                    "aep_loss": ep_from_years(agg[g], rps), "oep_loss": ep_from_years(occ[g], rps),
                    "tvar_loss": tvar(agg[g], rps)}))
    return pd.concat(rows, ignore_index=True) if rows else pd.DataFrame()
