"""People and time: casualties, downtime, contents and interruption losses in the run's tables.

Numerics live in :mod:`quakefolio.core.consequences`; this module lays them out:

- classical (damage stage): ``asset_consequences`` per asset and ``portfolio_consequences``
  (totals, losses by coverage), from the damage-state rates of every asset;
- event-based (event stage, where it runs): per-event casualties, downtime, contents and
  interruption losses (``event_consequences``), their annual averages against the
  classical expectation of the same source branch (``consequence_event_summary``) and
  AEP/OEP/TVaR at the configured return periods (``consequence_ep``);
- what-if: avoided casualties, downtime, contents and interruption losses per
  alternative and a benefit-cost ratio that adds them, with a life-safety benefit when
  ``[scenario] value_per_avoided_casualty`` is given (``whatif_people``,
  ``whatif_people_portfolio``).

Coverages and terms: the exposure's ``deductible`` and ``limit`` are terms of the
building coverage alone (per coverage, as today's net loss); contents and interruption
losses are reported ground-up (no terms).  Casualties count a class only if its library
gives ``casualty_rate`` (and the asset ``occupants``); downtime only with
``downtime_days``; assets without are left out of the totals and counted.
"""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from quakefolio.core.consequences import (
    QUANTITIES, event_consequence_sums, event_present_fraction, expected_annual_consequence, interruption_loss,
    mean_present_fraction,
)
from quakefolio.core.economics import benefit_cost_ratio, present_value
from quakefolio.core.events.eventset import STREAM_OCCUPANCY, stream_rng
from quakefolio.core.events.portfolio import aal_with_standard_error, ep_from_years, tvar, year_loss
from quakefolio.core.whatif import change, paired_aal_change
from quakefolio.pipeline.io.arrow_columns import index_of

__all__ = ["PeopleModel", "profile", "consequence_tables", "prepare_people", "chunk_consequences",
           "event_consequence_tables", "people_cache_key", "moved_people", "whatif_people_tables", "add_benefits",
           "year_totals", "UNITS"]

#: Unit of each quantity (``{currency}`` replaced by the run's currency).
UNITS = {"casualties": "persons", "downtime_days": "building-days", "contents_loss": "{currency}",
         "interruption_loss": "{currency}", "building_loss": "{currency}"}


def profile(config):
    """The time-of-day occupancy profile of a run.

    Parameters
    ----------
    config : Config

    Returns
    -------
    hours, present : ndarray [h], ndarray [-], or (None, None)
        From ``[exposure] occupancy_periods``; None when not given (every occupant present).
    """
    periods = config.exposure.occupancy_periods
    if not periods:
        return None, None
    return (np.array([p["hours"] for p in periods], dtype=float),
            np.array([p["present"] for p in periods], dtype=float))


def _present_fraction(config):
    hours, present = profile(config)
    return 1.0 if hours is None else mean_present_fraction(hours, present)


def _column(exposure, name):
    return exposure[name].to_numpy(dtype=float) if name in exposure.columns else np.full(len(exposure), np.nan)


# --- classical ------------------------------------------------------------------------------------


def consequence_tables(inputs, classes, asset_loss):
    """``asset_consequences`` and ``portfolio_consequences`` (classical).

    Parameters
    ----------
    inputs : RunInputs
    classes : dict code -> ClassDamage
        Per-pair damage-state rates of each class.
    asset_loss : DataFrame or pyarrow.Table
        The damage stage's ``asset_loss`` (building EAL per asset).

    Returns
    -------
    dict name -> DataFrame
    """
    ex = inputs.exposure
    n = len(ex)
    order = sorted(classes)
    cls = index_of(ex.building_class, order)
    cas_unit, down, contents_ratio = np.full(n, np.nan), np.full(n, np.nan), np.full(n, np.nan)
    for k, code in enumerate(order):
        cd, dss = classes[code], inputs.library[code]
        if not dss.has_damage_states:  # a vulnerability class gives no consequence per state: NaN, left out
            continue
        assets = np.flatnonzero(cls == k)
        ds = cd.ds_rates[np.searchsorted(cd.sites, inputs.site_index[assets])]
        cas_unit[assets] = expected_annual_consequence(ds, dss.casualty_rate)
        down[assets] = expected_annual_consequence(ds, dss.downtime_days)
        contents_ratio[assets] = expected_annual_consequence(ds, dss.contents_damage_ratio)
    f_bar = _present_fraction(inputs.config)
    occupants = _column(ex, "occupants")
    contents, per_day = _column(ex, "contents_value"), _column(ex, "interruption_value_per_day")
    casualties = occupants * f_bar * cas_unit
    contents_eal = np.where(np.nan_to_num(contents) > 0, contents * contents_ratio, np.where(np.isnan(contents),
                                                                                              np.nan, 0.0))
    bi_eal = np.where(np.nan_to_num(per_day) > 0, interruption_loss(down, per_day), np.where(np.isnan(per_day),
                                                                                              np.nan, 0.0))
    building = np.asarray(asset_loss["eal"].to_numpy(), dtype=float)
    assets_table = pd.DataFrame({
        "asset_id": ex.asset_id.array, "building_class": ex.building_class.array, "occupants": occupants,
        "mean_present_fraction": f_bar, "expected_annual_casualties": casualties,
        "expected_annual_downtime_days": down, "building_eal": building, "contents_value": contents,
        "contents_eal": contents_eal, "interruption_value_per_day": per_day, "interruption_eal": bi_eal,
        "total_eal": building + np.nan_to_num(contents_eal) + np.nan_to_num(bi_eal),
    })
    rows = []
    for metric, values, what in (("casualties", casualties, "occupants and a casualty_rate"),
                                 ("downtime_days", down, "downtime_days"),
                                 ("building_loss", building, "a replacement value"),
                                 ("contents_loss", contents_eal, "contents_value and contents_damage_ratio"),
                                 ("interruption_loss", bi_eal, "interruption_value_per_day and downtime_days")):
        ok = np.isfinite(values)
        rows.append({"metric": metric, "unit": UNITS[metric].replace("{currency}", inputs.config.scenario.currency)
                     + "/yr", "coverage_terms": _terms(metric), "classical_annual_mean": float(values[ok].sum()),
                     "assets_counted": int(ok.sum()), "assets_left_out": int((~ok).sum()), "counted_if": what})
    return {"asset_consequences": assets_table, "portfolio_consequences": pd.DataFrame(rows)}


def _terms(metric):
    if metric == "building_loss":
        return "ground-up (net of the exposure's deductible and limit in asset_loss/event tables)"
    if metric in ("contents_loss", "interruption_loss"):
        return "ground-up (no terms on this coverage)"
    return "not money"


# --- event-based ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class PeopleModel:
    """Per-asset weights of the event consequences and the fraction present at each event.

    ``weights`` (n_entries, 4): occupants, 1 (one building), contents value and value of a
    day of interruption per asset entry (0 where not given or the class gives no
    consequence); ``per_state`` code -> (n_ds, 4) finite consequences per state;
    ``counted`` (4,) bool per quantity: whether any asset counts;
    ``present`` (n_events,) [-].
    """

    weights: np.ndarray
    per_state: dict
    counted: np.ndarray
    present: np.ndarray


def _class_per_state(dss):
    """Casualty rate, downtime, contents ratio and downtime per state, shape (n_ds, 4); NaN where not
    given (a vulnerability class: one row of NaN, none given)."""
    if not dss.has_damage_states:
        return np.full((1, 4), np.nan)
    table = np.stack([dss.casualty_rate, dss.downtime_days, dss.contents_damage_ratio, dss.downtime_days], axis=1)
    return table


def prepare_people(inputs, n_events, seed, classes):
    """The :class:`PeopleModel` of the event stage.

    Parameters
    ----------
    inputs : RunInputs
    n_events : int
    seed : int
    classes : list
        The event model's class entries ``(code, assets, im index, dss, sites, pair)``.

    Returns
    -------
    PeopleModel
        The period of each event is drawn from :data:`STREAM_OCCUPANCY` by duration
        (:func:`quakefolio.core.consequences.event_present_fraction`).
    """
    ex = inputs.exposure
    weights = np.stack([np.nan_to_num(_column(ex, "occupants")), np.ones(len(ex)),
                        np.nan_to_num(_column(ex, "contents_value")),
                        np.nan_to_num(_column(ex, "interruption_value_per_day"))], axis=1)
    per_state = {}
    for code, assets, _, dss, _, _ in classes:
        table = _class_per_state(dss)
        given = np.isfinite(table).all(axis=0)
        weights[np.ix_(assets, ~given)] = 0.0
        per_state[code] = np.nan_to_num(table)
    hours, present = profile(inputs.config)
    rng = stream_rng(seed, STREAM_OCCUPANCY) if hours is not None else None
    return PeopleModel(weights, per_state, weights.any(axis=0), event_present_fraction(rng, n_events, hours, present))


def moved_people(people, changed, new_dss):
    """The people model with assets moved to appended entries of a new class (what-if rerun).

    Parameters
    ----------
    people : PeopleModel or None
    changed : ndarray of int
        Assets moved; their weights are zeroed in place and appended in this order.
    new_dss : DamageStateSet
        The new class (consequences it does not give get weight 0).

    Returns
    -------
    PeopleModel or None
    """
    if people is None:
        return None
    w = np.concatenate([people.weights, people.weights[changed]])
    w[changed] = 0.0
    given = np.isfinite(_class_per_state(new_dss)).all(axis=0)
    w[len(people.weights):, ~given] = 0.0
    per_state = dict(people.per_state)
    per_state[new_dss.class_code] = np.nan_to_num(_class_per_state(new_dss))
    return replace(people, weights=w, per_state=per_state)


def chunk_consequences(em, im, start, stop):
    """Casualties, downtime, contents and interruption loss of a chunk's events, shape (n_ev, 4).

    Parameters
    ----------
    em : EventModel
        With ``people`` (:func:`prepare_people`).
    im : ndarray, shape (n_ev, n_ims, n_sites) [g]
    start, stop : int
        The chunk's events.

    Returns
    -------
    ndarray or None
        Per event :data:`quakefolio.core.consequences.QUANTITIES`; casualties scaled by the
        fraction of occupants present at the event.
    """
    people = em.people
    if people is None:
        return None
    out = np.zeros((im.shape[0], len(QUANTITIES)))
    for code, assets, i_im, dss, usites, pair in em.classes:
        w = np.zeros((len(usites), len(QUANTITIES)))
        np.add.at(w, pair, people.weights[assets])
        if not w.any():  # nothing of this class counts (e.g. no consequences given): skip the kernel
            continue
        out += event_consequence_sums(im[:, i_im, usites], dss.medians, dss.betas, people.per_state[code], w)
    out[:, 0] *= people.present[start:stop]
    return out


def event_consequence_tables(em, inputs, per_event, classical_curves):
    """``event_consequences``, ``consequence_ep`` and ``consequence_event_summary``.

    Parameters
    ----------
    em : EventModel
    inputs : RunInputs
    per_event : ndarray, shape (n_events, 4)
        :func:`chunk_consequences` of every chunk, in event order.
    classical_curves : ndarray (n_ims, n_sites_used, n_levels) [1/yr]
        Classical curves of the event set's source branch (GMM-weighted).

    Returns
    -------
    dict name -> DataFrame
    """
    ev = em.events
    cur = inputs.config.scenario.currency
    rps = np.asarray(inputs.config.portfolio.return_periods_yr, dtype=float)
    events = pd.DataFrame({"event_id": ev.event_id, "year": ev.year.astype(np.int64),
                           "present_fraction": em.people.present,
                           **{q: per_event[:, k] for k, q in enumerate(QUANTITIES)}})
    classical = _classical_same_branch(em, inputs, classical_curves)
    ep_rows, summary_rows = [], []
    for k, q in enumerate(QUANTITIES):
        agg, occ = year_loss(ev.year, per_event[:, k], em.n_years)
        unit = UNITS[q].replace("{currency}", cur)
        ep_rows.append(pd.DataFrame({"metric": q, "unit": unit, "return_period_yr": rps,
                                     "aep_value": ep_from_years(agg, rps), "oep_value": ep_from_years(occ, rps),
                                     "tvar_value": tvar(agg, rps)}))
        mean, se = aal_with_standard_error(agg)
        counted = bool(em.people.counted[k])
        summary_rows.append({"metric": q, "unit": unit + "/yr", "counted": counted, "annual_average": float(mean),
                             "standard_error": float(se), "classical_same_branch": classical[k],
                             "z": float((mean - classical[k]) / se) if se > 0 else 0.0})
    return {"event_consequences": events, "consequence_ep": pd.concat(ep_rows, ignore_index=True),
            "consequence_event_summary": pd.DataFrame(summary_rows)}


def _classical_same_branch(em, inputs, curves):
    """Classical annual expectation of the 4 quantities for the event set's source branch (same weights)."""
    people = em.people
    f_bar = _present_fraction(inputs.config)
    total = np.zeros(len(QUANTITIES))
    for code, assets, i_im, dss, usites, pair in em.classes:
        if not dss.has_damage_states:  # no consequences given (weights 0)
            continue
        ds = dss.annual_rates(em.levels_g, curves[i_im, usites], tail=inputs.config.fragility.tail)
        per_pair = np.stack([expected_annual_consequence(ds, people.per_state[code][:, k])
                             for k in range(len(QUANTITIES))], axis=1)
        total += (per_pair[pair] * people.weights[assets]).sum(axis=0)
    total[0] *= f_bar
    return total


def people_cache_key(inputs):
    """What the event consequences depend on beyond the event stage's key.

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    dict
        The occupancy profile and the consequences per state of every class used.
    """
    lib = inputs.library
    used = sorted(set(inputs.exposure.building_class.unique()))
    return {"occupancy_periods": [dict(p) for p in (inputs.config.exposure.occupancy_periods or ())],
            "classes": {c: [lib[c].casualty_rate.tolist(), lib[c].downtime_days.tolist(),
                            lib[c].contents_damage_ratio.tolist()] if lib[c].has_damage_states else "vulnerability"
                        for c in used}}


# --- what-if --------------------------------------------------------------------------------------


def _asset_figures(inputs, ds, dss, assets):
    """Classical casualties [persons/yr], downtime [days/yr], contents and interruption EAL of ``assets``."""
    ex = inputs.exposure
    f_bar = _present_fraction(inputs.config)
    occ = np.nan_to_num(_column(ex, "occupants")[assets])
    contents = np.nan_to_num(_column(ex, "contents_value")[assets])
    per_day = np.nan_to_num(_column(ex, "interruption_value_per_day")[assets])
    table = _class_per_state(dss)  # NaN where the class does not give the consequence: NaN figures
    figures = np.stack([expected_annual_consequence(ds, table[:, k]) for k in range(4)], axis=1)
    return figures * np.stack([occ * f_bar, np.ones(len(assets)), contents, per_day], axis=1)


def whatif_people_tables(inputs, alternatives, by_class, ds_after, portfolio=None, reruns=None):
    """``whatif_people`` (classical, per alternative and asset) and ``whatif_people_portfolio``.

    Parameters
    ----------
    inputs : RunInputs
    alternatives : list of Alternative
    by_class : dict class -> (asset indices, ds rates, eal ratios)
        The run's per-asset rates.
    ds_after : dict alternative id -> ndarray (m, n_ds_new)
        Damage-state rates of the selected assets after the change.
    portfolio : (dict, dict) or None
        The event stage's tables and checks.
    reruns : dict alternative id -> ndarray (n_years, 4), optional
        Annual totals of the event consequences rerun for alternatives that change assets
        (:func:`year_totals`).

    Returns
    -------
    dict name -> DataFrame
        Benefit-cost with every avoided annual figure counted: building repair,
        contents and interruption losses, and casualties x ``value_per_avoided_casualty``
        when given (never a built-in value); ``benefits_counted`` says which.
    """
    scen = inputs.config.scenario
    totals = _totals(inputs, by_class, portfolio)
    ex = inputs.exposure
    ids = ex.asset_id.to_numpy()
    codes = ex.building_class.to_numpy()
    frames, rows = [], []
    for alt in alternatives:
        a = alt.assets
        before = np.zeros((len(a), 4))
        for code in sorted(set(codes[a])):
            pos = np.flatnonzero(codes[a] == code)
            assets, ds, _ = by_class[code]
            before[pos] = _asset_figures(inputs, ds[np.searchsorted(assets, a[pos])], inputs.library[code], a[pos])
        after = _asset_figures(inputs, ds_after[alt.alt_id], alt.dss, a)
        avoided = before - after
        frame = pd.DataFrame({"alternative_id": alt.alt_id, "scope": "asset", "asset_id": ids[a].astype(object),
                              "retrofit_cost": alt.retrofit_cost})
        for k, q in enumerate(("casualties", "downtime_days", "contents_eal", "interruption_eal")):
            frame[f"{q}_before"], frame[f"{q}_after"], frame[f"avoided_{q}"] = before[:, k], after[:, k], avoided[:, k]
        frames.append(frame)
        rows += _portfolio_rows(alt, before, after, totals, (reruns or {}).get(alt.alt_id), scen.currency)
    people = pd.concat(frames, ignore_index=True)
    return {"whatif_people": people, "whatif_people_portfolio": pd.DataFrame(rows)}


def add_benefits(tables, inputs):
    """Benefit-cost with every avoided figure: new columns of ``whatif_people``, a note in ``whatif_benefit_cost``.

    ``whatif_benefit_cost`` keeps its ratio (building repair cost only) and gains
    ``benefits_counted`` saying so; ``whatif_people`` gains the present values and
    ``benefit_cost_ratio_all`` (repair + contents + interruption + life safety when a
    value per avoided casualty is given).

    Parameters
    ----------
    tables : dict name -> DataFrame
        The what-if tables with ``whatif_benefit_cost`` and ``whatif_people``; changed in place.
    inputs : RunInputs

    Returns
    -------
    dict
        ``tables``.
    """
    scen = inputs.config.scenario
    bc, people = tables["whatif_benefit_cost"], tables["whatif_people"]
    value = scen.value_per_avoided_casualty
    bc["benefits_counted"] = "building repair cost only"
    per_asset = bc[bc.scope == "asset"]
    key = ["alternative_id", "asset_id"]
    merged = people.merge(per_asset[key + ["avoided_eal"]], on=key, how="left", validate="one_to_one")
    rate, years = scen.discount_rate, scen.benefit_horizon_yr
    pv_losses = present_value(merged.avoided_eal + merged.avoided_contents_eal + merged.avoided_interruption_eal,
                              rate, years)
    pv_life = present_value(merged.avoided_casualties * (value or 0.0), rate, years) if value else np.zeros(len(merged))
    people["pv_avoided_losses"] = np.asarray(pv_losses, dtype=float)
    people["value_per_avoided_casualty"] = np.nan if value is None else float(value)
    people["pv_life_safety_benefit"] = np.asarray(pv_life, dtype=float) if value else np.nan
    people["pv_total_benefit"] = people.pv_avoided_losses + np.nan_to_num(people.pv_life_safety_benefit)
    people["benefit_cost_ratio_all"] = benefit_cost_ratio(people.pv_total_benefit, people.retrofit_cost)
    people["benefits_counted"] = ("building repair, contents and interruption losses"
                                  + (" and casualties at the given value per avoided casualty" if value else
                                     "; no life-safety value given (set [scenario] value_per_avoided_casualty)"))
    sums = people.groupby("alternative_id", sort=False)[[c for c in people.columns if c not in (
        "alternative_id", "scope", "asset_id", "value_per_avoided_casualty", "benefit_cost_ratio_all",
        "benefits_counted")]].sum(min_count=1).reset_index()
    sums["scope"], sums["asset_id"] = "alternative", None
    sums["value_per_avoided_casualty"] = people["value_per_avoided_casualty"].iloc[0] if len(people) else np.nan
    sums["benefit_cost_ratio_all"] = benefit_cost_ratio(sums.pv_total_benefit, sums.retrofit_cost)
    sums["benefits_counted"] = people["benefits_counted"].iloc[0] if len(people) else ""
    order = []
    for aid in sums.alternative_id:
        order += [sums[sums.alternative_id == aid][people.columns], people[people.alternative_id == aid]]
    tables["whatif_people"] = pd.concat(order, ignore_index=True)
    return tables


def _row(alt_id, metric, basis, unit, before, after, se=np.nan):
    delta, relative = change(before, after)
    return {"alternative_id": alt_id, "metric": metric, "basis": basis, "unit": unit, "value_before": before,
            "value_after": after, "change": float(delta), "relative_change": float(relative),
            "standard_error_of_change": se}


def _portfolio_rows(alt, before, after, totals, rerun_years, cur):
    """Classical portfolio totals before/after (only the selected assets change) and event-based averages."""
    rows = []
    for k, q in enumerate(QUANTITIES):
        unit = UNITS[q].replace("{currency}", cur) + "/yr"
        total = float(totals["classical"][k])
        # NaN where an asset's class gives the consequence before but the new class does not
        after_total = total - float(np.nansum(before[:, k]) - after[:, k].sum())
        rows.append(_row(alt.alt_id, q, "classical", unit, total, after_total))
        if "event_years" not in totals:
            continue
        years_before = totals["event_years"][:, k]
        mean_before = float(np.mean(years_before))
        if rerun_years is None:  # nothing recomputed: the run's own figures
            rows.append(_row(alt.alt_id, q, "event_based", unit, mean_before, mean_before, 0.0))
        else:
            mean_after, se = paired_aal_change(years_before, rerun_years[:, k])  # same simulated years
            if not np.isfinite(after_total):
                mean_after, se = np.nan, np.nan
            rows.append(_row(alt.alt_id, q, "event_based", unit, mean_before, mean_after, se))
    return rows


def _totals(inputs, by_class, portfolio):
    """Classical totals of the 4 quantities over every asset, and the run's event year totals (n_years, 4)."""
    total = np.zeros(len(QUANTITIES))
    for code, (assets, ds, _) in sorted(by_class.items()):
        total += np.nansum(_asset_figures(inputs, ds, inputs.library[code], assets), axis=0)
    out = {"classical": total}
    if portfolio is not None and "event_consequences" in portfolio[0]:
        ev = portfolio[0]["event_consequences"]
        n_years = int(portfolio[0]["portfolio_summary"]["n_years"].iloc[0])
        out["event_years"] = np.stack([year_loss(ev.year.to_numpy(), ev[q].to_numpy(), n_years)[0]
                                       for q in QUANTITIES], axis=1)
    return out


def year_totals(event_year, per_event, n_years):
    """Annual totals of per-event consequences.

    Parameters
    ----------
    event_year : ndarray of int (n_events,)
    per_event : ndarray (n_events, n_q)
    n_years : int

    Returns
    -------
    ndarray (n_years, n_q)
    """
    return np.stack([year_loss(event_year, per_event[:, k], n_years)[0] for k in range(per_event.shape[1])], axis=1)
