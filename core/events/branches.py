r"""Statistics of an event set whose simulated years belong to logic-tree branch combinations.

With the whole logic tree in the event-based stage every simulated year is one
realisation of one branch combination :math:`c` (source-model branch x ground-motion
branch, weight :math:`w_c`), :math:`N_c` years each
(:func:`quakefolio.core.events.eventset.branch_years`). This module turns the event and
year losses of such a set into

* per-combination AAL with its compound-Poisson standard error (:func:`group_aal`),
* per-combination PML (AEP, OEP) and TVaR at return periods (:func:`group_ep`),
* the empirical exceedance probability of the pooled years at given losses, the weighted
  mean of the combinations' (:func:`empirical_exceedance`),
* weighted fractiles across combinations (:func:`branch_fractiles`).

References
----------
Acerbi, C. & Tasche, D. (2002). On the coherence of expected shortfall. Journal of
Banking & Finance 26(7), 1487-1503 (TVaR, via :func:`quakefolio.core.events.portfolio.tvar`).
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.events.portfolio import ep_from_years, tvar
from quakefolio.core.hazard import weighted_fractiles

__all__ = ["group_aal", "group_ep", "empirical_exceedance", "branch_fractiles"]


def group_aal(event_loss, event_group, group_years):
    r"""AAL [currency/yr] and its compound-Poisson standard error per group of years.

    Parameters
    ----------
    event_loss : array_like, shape (n_events,) [currency]
    event_group : array_like of int, shape (n_events,)
        Group (branch combination) of each event's year, in ``0..n_groups-1``.
    group_years : array_like of int, shape (n_groups,)
        Simulated years :math:`N_c` of each group.

    Returns
    -------
    aal, standard_error : ndarray, shape (n_groups,) [currency/yr]
        :math:`\sum_{e \in c} L_e / N_c` and :math:`\sqrt{\sum_{e \in c} L_e^2} / N_c`;
        NaN for a group without years.

    Notes
    -----
    Within a group, the annual loss is compound Poisson, whose variance is
    :math:`\sum_r \nu_r E[L_r^2]`, estimated by :math:`\sum_e L_e^2 / N_c`; the standard
    error of the mean of :math:`N_c` years is its square root over :math:`\sqrt{N_c}`
    (common practice).
    """
    loss = np.asarray(event_loss, dtype=float)
    grp = np.asarray(event_group, dtype=np.int64)
    n = np.asarray(group_years, dtype=float)
    total = np.bincount(grp, weights=loss, minlength=n.size)
    sumsq = np.bincount(grp, weights=loss * loss, minlength=n.size)
    with np.errstate(divide="ignore", invalid="ignore"):
        aal = np.where(n > 0, total / n, np.nan)
        se = np.where(n > 0, np.sqrt(sumsq) / n, np.nan)
    return aal, se


def group_ep(year_losses, year_group, n_groups, return_periods_yr):
    r"""PML and TVaR [currency] of each group's own years.

    Parameters
    ----------
    year_losses : array_like, shape (n_years,) [currency]
        Annual totals (AEP) or annual maxima (OEP) of every simulated year.
    year_group : array_like of int, shape (n_years,)
        Group of every year.
    n_groups : int
    return_periods_yr : array_like, shape (R,) [yr]

    Returns
    -------
    pml, tail : ndarray, shape (n_groups, R) [currency]
        :func:`quakefolio.core.events.portfolio.ep_from_years` and
        :func:`~quakefolio.core.events.portfolio.tvar` over the group's :math:`N_c` years;
        NaN where :math:`T > N_c` (or the group has no year).
    """
    y = np.asarray(year_losses, dtype=float)
    g = np.asarray(year_group, dtype=np.int64)
    rps = np.asarray(return_periods_yr, dtype=float)
    pml = np.full((n_groups, rps.size), np.nan)
    tail = np.full((n_groups, rps.size), np.nan)
    for c in range(n_groups):
        own = y[g == c]
        if own.size:
            pml[c], tail[c] = ep_from_years(own, rps), tvar(own, rps)
    return pml, tail


def empirical_exceedance(year_losses, x):
    r"""Share of simulated years whose loss exceeds each threshold.

    Parameters
    ----------
    year_losses : array_like, shape (N,) [currency]
    x : array_like, shape X [currency]

    Returns
    -------
    ndarray, shape X [-]
        :math:`\#\{y : L_y > x\} / N`. For years stratified into groups of
        :math:`N_c` years this is exactly :math:`\sum_c (N_c/N)\,\hat P_c(L > x)`, the
        weighted mean of the groups' exceedance curves.
    """
    y = np.sort(np.asarray(year_losses, dtype=float))
    return (y.size - np.searchsorted(y, np.asarray(x, dtype=float), side="right")) / y.size


def branch_fractiles(values, weights, quantiles):
    r"""Weighted fractiles across branch combinations, element by element.

    Parameters
    ----------
    values : array_like, shape (n_branches, ...)
        A statistic of each combination (AAL, PML or TVaR); NaN where not estimable.
    weights : array_like, shape (n_branches,) [-]
        Logic-tree weights, summing to 1.
    quantiles : array_like, shape (Q,)
        Probabilities in (0, 1).

    Returns
    -------
    ndarray, shape (Q,) + values.shape[1:]
        The smallest branch value whose cumulative weight reaches q (inverse of the
        weighted empirical distribution;
        :func:`quakefolio.core.hazard.weighted_fractiles`, the convention of the hazard
        fractiles); NaN wherever some branch's value is NaN.
    """
    v = np.asarray(values, dtype=float)
    missing = np.isnan(v).any(axis=0)
    out = weighted_fractiles(np.where(np.isnan(v), 0.0, v), weights, quantiles)
    return np.where(missing, np.nan, out)
