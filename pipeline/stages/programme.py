"""Tables of the programme terms above the building (``[programme]``), from the event-based stage.

The loss entering the layers is the **portfolio net loss of each event after building
and group terms** (:func:`quakefolio.core.events.programme.chunk_programme_loss`,
summed in the event chunks); layers, statistics and EP values come from
:func:`quakefolio.core.events.programme.evaluate_layers`.  This module lays them out as
tables; nothing is written when ``[programme]`` is empty.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.events.losses import sum_over_blocks
from quakefolio.core.events.portfolio import aal_with_standard_error, year_loss
from quakefolio.core.events.programme import evaluate_layers
from quakefolio.pipeline.io.layers import layers_of

__all__ = ["programme_tables", "programme_digest"]


def programme_digest(inputs):
    """What the programme tables add to the event stage's cache key: () without a programme.

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    tuple
        The resolved ``[programme]`` section and the group terms file's sha256, when set.
    """
    pr = inputs.config.resolved()["programme"]
    if not any(pr.values()):
        return ()
    return ("programme", pr, (inputs.input_hashes.get("group_terms") or {}).get("sha256"))


def _group_table(em, results, n_years):
    gt = em.group_terms
    sums = sum_over_blocks([r.group_sum for r in results])
    return pd.DataFrame({
        "terms_group": np.array(gt.ids, dtype=object),
        "n_assets": np.bincount(gt.group_of_asset, minlength=len(gt.ids)).astype(np.int64),
        "deductible": gt.deductible, "limit": gt.limit,
        "aal_before_group_terms": sums[0] / n_years, "aal_after_group_terms": sums[1] / n_years,
    })


def _layer_tables(em, layers, year, loss, rps):
    """layer_event_loss, layer_year_loss, layer_summary, layer_ep."""
    n_years = em.n_years
    ev_rows, yr_rows, summary, ep_rows = [], [], [], []
    years = np.arange(1, n_years + 1, dtype=np.int64)
    for res in evaluate_layers(year, loss, n_years, layers, rps):
        lay = res["layer"]
        if res["event_paid"] is not None:
            hit = res["event_uncapped"] > 0
            ev_rows.append(pd.DataFrame({
                "layer_id": lay.id, "event_id": em.events.event_id[hit], "year": year[hit],
                "programme_loss": loss[hit], "layer_loss_before_cap": res["event_uncapped"][hit],
                "layer_loss": res["event_paid"][hit]}))
        paid = res["year_paid"] > 0
        yr_rows.append(pd.DataFrame({"layer_id": lay.id, "layer_kind": lay.kind, "year": years[paid],
                                     "entering_loss": res["year_entering"][paid], "layer_loss": res["year_paid"][paid]}))
        summary.append({
            "layer_id": lay.id, "layer_kind": lay.kind, "attachment": lay.attachment, "limit": lay.limit,
            "reinstatements": np.nan if lay.reinstatements is None else float(lay.reinstatements),
            "annual_cap": lay.annual_cap, "expected_annual_loss": res["expected_annual_loss"],
            "expected_annual_loss_standard_error": res["standard_error"], "prob_attachment": res["prob_attachment"],
            "prob_exhaustion": res["prob_exhaustion"], "prob_annual_cap_used": res["prob_annual_cap_used"],
            "n_years": n_years, "loss_model": em.loss_model})
        ep_rows.append(pd.DataFrame({"layer_id": lay.id, "layer_kind": lay.kind, "return_period_yr": rps,
                                     "aep_layer_loss": res["aep"], "oep_layer_loss": res["oep"],
                                     "tvar_layer_loss": res["tvar"]}))
    empty_ev = pd.DataFrame({"layer_id": pd.Series(dtype=object), "event_id": pd.Series(dtype=np.int64),
                             "year": pd.Series(dtype=np.int64), "programme_loss": pd.Series(dtype=float),
                             "layer_loss_before_cap": pd.Series(dtype=float), "layer_loss": pd.Series(dtype=float)})
    return {
        "layer_event_loss": pd.concat(ev_rows, ignore_index=True) if ev_rows else empty_ev,
        "layer_year_loss": pd.concat(yr_rows, ignore_index=True),
        "layer_summary": pd.DataFrame(summary),
        "layer_ep": pd.concat(ep_rows, ignore_index=True),
    }


def programme_tables(em, inputs, results):
    """The programme tables of an event-based run (empty dict without ``[programme]``).

    Parameters
    ----------
    em : quakefolio.pipeline.stages.events.EventModel
    inputs : RunInputs
    results : list of ChunkResult
        In event order.

    Returns
    -------
    dict name -> DataFrame
        ``programme_summary`` (AAL after building terms and after group terms),
        ``group_loss`` (with group terms), ``layer_event_loss``, ``layer_year_loss``,
        ``layer_summary``, ``layer_ep`` (with layers).
    """
    settings = inputs.config.programme
    if em.group_terms is None and not settings.occurrence_layers and not settings.aggregate_layers:
        return {}
    n_years = em.n_years
    results = sorted(results, key=lambda r: r.start)
    year = np.asarray(em.events.year, dtype=np.int64)
    net = np.concatenate([r.net for r in results]) if results else np.zeros(0)
    loss = np.concatenate([r.programme for r in results]) if results else np.zeros(0)
    rows = []
    for basis, values in (("net", net), ("programme", loss)):
        agg, occ = year_loss(year, values, n_years)
        aal, se = aal_with_standard_error(agg) if n_years >= 2 else (agg.mean(), np.nan)
        rows.append({"basis": basis, "aal": float(aal), "aal_standard_error": float(se),
                     "max_event_loss": float(occ.max()) if n_years else 0.0, "n_years": n_years,
                     "n_groups": 0 if em.group_terms is None else len(em.group_terms.ids),
                     "loss_model": em.loss_model})
    tables = {"programme_summary": pd.DataFrame(rows)}
    if em.group_terms is not None:
        tables["group_loss"] = _group_table(em, results, n_years)
    if settings.occurrence_layers or settings.aggregate_layers:
        rps = np.asarray(inputs.config.portfolio.return_periods_yr, dtype=float)
        tables.update(_layer_tables(em, layers_of(settings), year, loss, rps))
    return tables

