"""The whole logic tree in the event-based stage: year assignment, per-branch tables, fractiles.

In whole-tree mode (``[portfolio] source_branch = ""``, the default) every simulated year
is one realisation of one branch combination (source-model branch x ground-motion
branch), the combinations holding their weight's share of the years
(:func:`quakefolio.core.events.eventset.branch_years`); the pooled years are the
weighted-mean EP and each combination's years its own EP curve
(:mod:`quakefolio.core.events.eventset`, "Whole logic tree"). Numerics live in
:mod:`quakefolio.core.events.eventset` and :mod:`quakefolio.core.events.branches`; this
module prepares the event set and lays the per-branch results out as tables.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.events.branches import branch_fractiles, group_aal, group_ep
from quakefolio.core.events.eventset import branch_years, logic_tree_event_set
from quakefolio.core.hazard import weighted_sum
from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.sources.ruptures import RuptureSet

__all__ = ["WHOLE_TREE", "whole_tree_events", "combination_curves", "classical_by_combination",
           "branch_tables", "event_branch_columns", "branch_ids", "mean_curves"]

#: ``source_branch`` value of the summary when every branch enters by weight.
WHOLE_TREE = "all"


def whole_tree_events(model, years, seed):
    """Event set of the whole logic tree: each year one (source, GMM) combination by weight.

    Parameters
    ----------
    model : HazardModel
        With ``source_branches`` and ``gmm_branches``.
    years : int
        Simulated years N.
    seed : int
        The run's seed.

    Returns
    -------
    ruptures : RuptureSet
        Every source branch's ruptures, concatenated in branch order (source ids merged by
        name, :meth:`RuptureSet.concat`).
    events : EventSet
        :func:`quakefolio.core.events.eventset.logic_tree_event_set`; ``rupture`` indexes
        ``ruptures``.
    gmm_of_event : ndarray of int64, shape (n_events,)
        The ground-motion model of each event's year.
    year_combo : ndarray of int64, shape (N,)
        Combination of every year (:func:`quakefolio.core.events.eventset.branch_years`).
    combos : tuple of (source index, gmm index, weight)
        Source-major order, as the hazard stage's branch curves ``(n_src, n_gmm, ...)``.
    offsets : ndarray of int64, shape (n_src,)
        First rupture of each source branch in ``ruptures``.
    """
    ws = [w for _, w, _ in model.source_branches]
    wg = [w for _, w, _ in model.gmm_branches]
    combos = tuple((s, g, ws[s] * wg[g]) for s in range(len(ws)) for g in range(len(wg)))
    weights = np.array([w for _, _, w in combos])
    year_combo = branch_years(weights / weights.sum(), years, seed)
    src_of, gmm_of = np.array([c[0] for c in combos]), np.array([c[1] for c in combos])
    sets = [src.ruptures for _, _, src in model.source_branches]
    events = logic_tree_event_set([rs.rate for rs in sets], src_of[year_combo], seed)
    offsets = np.cumsum([0] + [len(rs) for rs in sets[:-1]]).astype(np.int64)
    gmm_of_event = gmm_of[year_combo[events.year - 1]].astype(np.int64)
    return RuptureSet.concat(sets), events, gmm_of_event, year_combo, combos, offsets


def combination_curves(model, sites):
    """Classical hazard curves of every branch combination at some sites.

    Parameters
    ----------
    model : HazardModel
        With ``branch_curves`` (n_src, n_gmm, n_im, n_sites, n_lev) [1/yr].
    sites : ndarray of int
        Hazard-site indices.

    Returns
    -------
    ndarray, shape (n_src * n_gmm, n_im, len(sites), n_lev) [1/yr]
        Source-major combination order.
    """
    bc = model.branch_curves
    return bc.reshape((-1,) + bc.shape[2:])[:, :, sites]


def classical_by_combination(em, model, tail):
    """Classical EAL of every asset under each branch combination's hazard.

    Parameters
    ----------
    em : EventModel
        Whole-tree event model (classes, values, sites, combinations).
    model : HazardModel
    tail : str
        ``[fragility] tail``.

    Returns
    -------
    ndarray, shape (n_combos, n_assets) [currency/yr]
    """
    curves = combination_curves(model, em.sites)
    out = np.zeros((len(em.combos), len(em.value)))
    for _, assets, i_im, dss, usites, pair in em.classes:
        ds, mdr, _ = dss.loss_states(em.levels_g, curves[:, i_im][:, usites], tail=tail)
        out[:, assets] = expected_annual_loss(ds, mdr)[:, pair] * em.value[assets]
    return out


def mean_curves(model, sites):
    r"""Logic-tree weighted mean hazard curves at some sites.

    Parameters
    ----------
    model : HazardModel
    sites : ndarray of int

    Returns
    -------
    ndarray, shape (n_im, len(sites), n_lev) [1/yr]
        :math:`\sum_c w_c \lambda_c` over every (source, GMM) combination.
    """
    ws = np.array([w for _, w, _ in model.source_branches])
    wg = np.array([w for _, w, _ in model.gmm_branches])
    return weighted_sum(combination_curves(model, sites), (ws[:, None] * wg[None, :]).ravel())


def event_branch_columns(em, model):
    """Source branch of each event and its rupture's index within that branch (whole-tree mode).

    Parameters
    ----------
    em : EventModel
    model : HazardModel

    Returns
    -------
    branch_id : ndarray of object, shape (n_events,)
    rupture : ndarray of int64, shape (n_events,)
    """
    ids = np.array([b for b, _, _ in model.source_branches], dtype=object)
    src = np.array([c[0] for c in em.combos])[em.year_combo[em.events.year - 1]]
    return ids[src], em.events.rupture - em.rupture_offsets[src]


def branch_ids(em, model):
    """Ids of every branch combination.

    Parameters
    ----------
    em : EventModel
    model : HazardModel

    Returns
    -------
    source_ids, gmm_ids : list of str
        One entry per combination, in ``em.combos`` order.
    """
    sid = [model.source_branches[s][0] for s, _, _ in em.combos]
    gid = [em.gmm_ids[g] for _, g, _ in em.combos]
    return sid, gid


def branch_tables(em, model, gu, net, years, rps, fractiles, classical):
    """Per-combination summary and EP tables and the fractiles across combinations.

    Parameters
    ----------
    em : EventModel
        Whole-tree event model (``year_combo``, ``combos``).
    model : HazardModel
    gu, net : ndarray, shape (n_events,) [currency]
        Event losses.
    years : dict basis -> (aggregate, maximum), each shape (N,) [currency]
    rps : ndarray [yr]
        Return periods.
    fractiles : sequence of float
        Probabilities of the fractiles across combinations (``[hazard] fractiles``).
    classical : ndarray, shape (n_combos, n_assets) [currency/yr]
        :func:`classical_by_combination`.

    Returns
    -------
    dict name -> DataFrame
        ``portfolio_branch_summary``, ``portfolio_branch_ep``, ``portfolio_branch_fractiles``.
    """
    n_c = len(em.combos)
    w = np.array([c[2] for c in em.combos])
    w = w / w.sum()
    n_years_c = np.bincount(em.year_combo, minlength=n_c)
    ev_combo = em.year_combo[em.events.year - 1]
    n_events_c = np.bincount(ev_combo, minlength=n_c)
    sid, gid = branch_ids(em, model)
    cl = classical.sum(axis=1)
    head = {"source_branch": sid, "gmm": gid, "weight": w, "n_years": n_years_c.astype(np.int64)}
    summary, ep, frac = [], [], []
    for basis, loss in (("ground_up", gu), ("net", net)):
        aal, se = group_aal(loss, ev_combo, n_years_c)
        ref = cl if basis == "ground_up" else np.full(n_c, np.nan)
        with np.errstate(divide="ignore", invalid="ignore"):
            z = np.where(se > 0, (aal - ref) / se, np.nan)
        summary.append(pd.DataFrame({**head, "n_events": n_events_c.astype(np.int64), "basis": basis, "aal": aal,
                                     "aal_standard_error": se, "classical_eal": ref, "z_score": z}))
        agg, occ = years[basis]
        pml_a, tv = group_ep(agg, em.year_combo, n_c, rps)
        pml_o, _ = group_ep(occ, em.year_combo, n_c, rps)
        for c in range(n_c):
            ep.append(pd.DataFrame({**{k: v[c] for k, v in head.items()}, "basis": basis, "return_period_yr": rps,
                                    "aep_loss": pml_a[c], "oep_loss": pml_o[c], "tvar_loss": tv[c]}))
        q = np.asarray(fractiles, dtype=float)
        frac.append(_fractile_rows(basis, "aal", [np.nan], branch_fractiles(aal[:, None], w, q), q))
        for metric, values in (("aep_loss", pml_a), ("oep_loss", pml_o), ("tvar_loss", tv)):
            frac.append(_fractile_rows(basis, metric, rps, branch_fractiles(values, w, q), q))
    return {"portfolio_branch_summary": pd.concat(summary, ignore_index=True),
            "portfolio_branch_ep": pd.concat(ep, ignore_index=True),
            "portfolio_branch_fractiles": pd.concat(frac, ignore_index=True)}


def _fractile_rows(basis, metric, rps, values, q):
    """Long-form rows of one metric's fractiles: values shape (Q, R)."""
    rps = np.asarray(rps, dtype=float)
    return pd.DataFrame({"basis": basis, "metric": metric, "return_period_yr": np.tile(rps, q.size),
                         "fractile": np.repeat(q, rps.size), "value": np.asarray(values, dtype=float).ravel()})
