r"""Decision support: collapse-risk screening and retrofit what-if alternatives (stage functions).

Collapse-risk screening (always on, ``[screening]``)
    Per asset, the annual collapse rate of the run and its Poisson probability in
    ``collapse_target_years``, :math:`P = 1 - e^{-\lambda_c t}`, against
    ``collapse_target_prob`` (default 1% in 50 years, the collapse target of ASCE/SEI 7-16
    Chapter 21).  Per hazard site and IM, the risk-targeted IM of the mean curve: the IM at
    which a generic lognormal collapse fragility (dispersion ``rt_beta``, probability
    ``rt_prob_at_im`` of collapse at that IM) reaches the target (ASCE/SEI 7-16 Section
    21.2.1.2, after Luco et al. 2007; :func:`quakefolio.core.risk.risk_targeted_im`),
    beside the uniform-hazard IM of 2% in 50 years and their ratio, the risk coefficient.

Retrofit what-if (``[[scenario.alternatives]]``)
    Each alternative moves a set of assets to another building class (optionally from
    another fragility library) and is evaluated against the run on its own (alternatives
    are not combined).  Per affected asset the damage-state rates, the annual collapse
    rate and its probability in the horizon and the EAL are recomputed per unique
    (site, class) pair with the kernels of :func:`quakefolio.pipeline.stages.damage.compute_block`.
    Assets whose new class has the same fragility and consequence parameters as their
    current one are not recomputed (their results are unchanged by definition).  In an
    event-based run the event losses are recomputed with the same events and ground-motion
    fields (same seed and random streams) with the changed class assignment, giving the
    change in AAL (with the standard error of the paired difference of year losses), PML
    on the AEP and OEP curves and TVaR.  Benefit-cost: the present value of the avoided EAL
    over ``benefit_horizon_yr`` at ``discount_rate`` (an ordinary annuity, common
    practice) against the retrofit cost.

No Prefect here: :func:`evaluate` is one stage called by
:func:`quakefolio.pipeline.runner.execute`; numerics go through :mod:`quakefolio.core`
and :mod:`quakefolio.fragility`.

References
----------
ASCE (2017). Minimum Design Loads and Associated Criteria for Buildings and Other
Structures, ASCE/SEI 7-16, Section 21.2.1.2 (risk-targeted ground motion, method 2).

Luco, N., Ellingwood, B.R., Hamburger, R.O., Hooper, J.D., Kimball, J.K., Kircher, C.A.
(2007). Risk-targeted versus current seismic design maps for the conterminous United
States. SEAOC 2007 Convention Proceedings.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.core.curves import im_at_rate, prob_in_years, rate_from_prob
from quakefolio.core.economics import annuity_factor, benefit_cost_ratio, present_value
from quakefolio.core.errors import InputError, did_you_mean, locate_toml_line
from quakefolio.core.events.losses import sum_over_blocks
from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.events.portfolio import ep_from_years, tvar, year_loss
from quakefolio.core.risk import risk_targeted_im
from quakefolio.core.whatif import alternative_change, change, paired_aal_change, rerun_asset_aal
from quakefolio.fragility import load_library
from quakefolio.pipeline.io.arrow_columns import index_of, take_text, text_array, text_series
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.io.run_inputs import new_class_frame
from quakefolio.pipeline.stages.checks import LibraryLines, TabulatedLevels, check_class_hazard, computed_levels
from quakefolio.pipeline.stages.people import add_benefits, moved_people, whatif_people_tables, year_totals

__all__ = ["Alternative", "EventRerun", "validate", "evaluate", "screening_tables", "alternative_tables",
           "rerun_events", "annuity_factor", "present_value", "UHS_PROB", "UHS_YEARS"]

#: Uniform-hazard reference of the risk coefficient: 2% probability of exceedance in 50 years
#: (the MCE ground motion that ASCE/SEI 7-16 Section 21.2.1.2 scales by the risk coefficient).
UHS_PROB, UHS_YEARS = 0.02, 50.0

_TABLE = ("scenario", "alternatives")


@dataclass(frozen=True)
class Alternative:
    """One validated retrofit alternative."""

    alt_id: str
    description: str
    assets: np.ndarray  # exposure row indices of the selected assets, ascending
    new_class: str
    dss: object  # DamageStateSet of new_class
    library: str  # file new_class comes from
    retrofit_cost: np.ndarray  # (n_selected,) [currency], per asset
    changed: np.ndarray  # (n_selected,) bool: the new class's parameters differ from the current ones


def _suggestion(name, valid, what):
    names = list(valid)
    ordered = sorted(names)
    shown = ", ".join(ordered[:12]) + (", ..." if len(ordered) > 12 else "")
    return did_you_mean(name, names, cutoff=0.6, otherwise=f"; {what}: {shown}", quote="repr")


def _need_damage_states(fail, new, selected_classes, library, by_class):
    """An alternative compares damage states and collapse before and after: no vulnerability class on either side
    (``by_class``: the class the alternative selects by, or None)."""
    if not new.has_damage_states:
        fail(f"new_class {new.class_code!r} is given by a vulnerability table: a retrofit alternative compares "
             "damage states and collapse, so its new class needs damage states", "new_class")
    for code in sorted(set(selected_classes)):
        if not library[code].has_damage_states:
            fail(f"the alternative selects assets of class {code!r}, given by a vulnerability table: a retrofit "
                 "alternative compares damage states and collapse, so the assets it selects need them",
                 "building_class" if code == by_class else "assets")


def _same_fragility(a, b):
    """True when two damage-state sets give identical damage, loss and consequences (same IM and parameters)."""
    return (a.im == b.im and a.collapse_index == b.collapse_index and a.n_states == b.n_states
            and all(np.array_equal(getattr(a, k), getattr(b, k), equal_nan=True)
                    for k in ("medians", "betas", "mean_damage_ratio", "cov", "casualty_rate", "downtime_days",
                              "contents_damage_ratio")))


def validate(inputs, hashes=None, lines=None):
    """Check every ``[[scenario.alternatives]]`` table against the exposure, libraries and hazard.

    Raises InputError naming the config file, the line and the key
    (``scenario.alternatives[i].<key>``) for unknown asset ids and classes, and naming the
    library file for a new class whose IM the hazard cannot provide or whose curves
    cross.  Records the path and sha256 of every extra library in ``hashes`` (a dict),
    if given.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        The run's validated inputs (exposure, library, hazard).
    hashes : dict, optional
        Filled with ``{"fragility_library:<alt_id>": {"path": ..., "sha256": ...}}`` per extra
        library.
    lines : quakefolio.pipeline.stages.checks.LibraryLines, optional
        Line locator of the library files already used by the run (a new one if not given).

    Returns
    -------
    list of :class:`Alternative`, in config order.
    """
    cfg = inputs.config
    entries = cfg.scenario.alternatives
    if not entries:
        return []
    lines = lines or LibraryLines()
    if inputs.hazard_model is None:
        levels_of = TabulatedLevels(inputs.hazard, cfg.hazard.period_interpolation)
    else:
        levels_of = computed_levels(inputs.hazard_model, cfg.path)
    config_text = Path(cfg.path).read_text(encoding="utf-8")
    ex = inputs.exposure
    ids = ex.asset_id.to_numpy().astype(str)
    position = pd.Series(np.arange(len(ids)), index=ids)
    classes = ex.building_class.to_numpy()
    out = []
    for i, entry in enumerate(entries):
        aid = entry["id"]

        def fail(msg, key):
            raise InputError(cfg.path, f"alternative {aid!r}: {msg}", row=locate_toml_line(config_text, _TABLE, key, i),
                             column=f"scenario.alternatives[{i}].{key}")

        selected = np.zeros(len(ex), dtype=bool)
        if entry["assets"]:
            wanted = np.asarray(entry["assets"], dtype=str)
            known = np.isin(wanted, ids)
            if not known.all():
                bad = str(wanted[np.argmin(known)])
                fail(f"unknown asset id {bad!r}" + _suggestion(bad, ids, f"the exposure {cfg.exposure.file} "
                                                                         "has ids"), "assets")
            selected[position.loc[wanted].to_numpy()] = True
        code = entry["building_class"]
        if code is not None:
            if code not in inputs.library:
                fail(f"unknown building class {code!r}" + _suggestion(code, inputs.library.classes,
                                                                      "the library defines"), "building_class")
            of_class = classes == code
            if not of_class.any():
                fail(f"no asset of class {code!r} in the exposure {cfg.exposure.file}", "building_class")
            selected |= of_class
        if entry["fragility_library"] is None:
            library, library_path = inputs.library, str(cfg.fragility.library)
        else:
            library_path = str(entry["fragility_library"])
            library = load_library(library_path)
            if hashes is not None:
                hashes[f"fragility_library:{aid}"] = {"path": library_path, "sha256": library.sha256}
        new_class = entry["new_class"]
        if new_class not in library:
            fail(f"unknown building class {new_class!r}" + _suggestion(new_class, library.classes,
                                                                       f"{library_path} defines"), "new_class")
        dss = library[new_class]
        _need_damage_states(fail, dss, classes[selected], inputs.library, entry["building_class"])
        # the hazard must provide the new class's IM, and its curves must not cross (as for the run's classes)
        check_class_hazard(dss, levels_of, library_path, lines, reject_crossing=cfg.fragility.crossing == "reject",
                           alternative=aid)
        assets = np.flatnonzero(selected)
        value = ex.replacement_value.to_numpy()[assets]
        if entry["retrofit_cost"] is not None:
            cost = np.full(len(assets), entry["retrofit_cost"])
        else:
            cost = entry["retrofit_cost_ratio"] * value
        changed = np.array([not _same_fragility(inputs.library[c], dss) for c in classes[assets]], dtype=bool)
        out.append(Alternative(aid, entry["description"], assets, new_class, dss, library_path, cost, changed))
    return out


# --- per-pair kernels -------------------------------------------------------------------------

def _pair_kernel(inputs, dss, sites):
    """Damage-state rates (m, n_ds) [1/yr] and EAL ratio (m,) [1/yr] at unique hazard sites.

    The calls of :func:`quakefolio.pipeline.stages.damage.compute_block` (same curves, tail
    policy and crossing option).
    """
    fr = inputs.config.fragility
    levels, rates = curves_for_im(inputs.hazard, dss.im)
    if not dss.has_damage_states:  # a vulnerability class: no damage-state rates, its EAL from its bins
        r, mdr, _ = dss.loss_states(levels[sites], rates[sites], tail=fr.tail)
        return np.zeros((len(sites), 0)), expected_annual_loss(r, mdr)
    ds = dss.annual_rates(levels[sites], rates[sites], tail=fr.tail, envelope=fr.crossing == "envelope")
    return ds, expected_annual_loss(ds, dss.mean_damage_ratio)


def _run_asset_rates(inputs, results):
    """Per class: the run's damage-state rates and EAL ratio of each of its assets.

    Taken from the damage stage's block results (and pairs it read from the content
    cache); a pair found in neither is computed with the same kernels.

    Returns dict class -> (asset indices, ds rates (a, n_ds), eal ratio (a,)).
    """
    parts = {}
    for res in results or ():
        parts.setdefault(res.block.class_code, []).append((res.block.sites, res.ds_rates, res.eal_ratio))
    for code, (sites, rows) in (getattr(inputs, "cached_pairs", None) or {}).items():
        if len(sites):
            parts.setdefault(code, []).append((sites, rows["ds"], rows["eal"]))
    codes = sorted(set(inputs.exposure.building_class.unique()))
    cls = index_of(inputs.exposure.building_class, codes)
    out = {}
    for k, code in enumerate(codes):
        dss = inputs.library[code]
        assets = np.flatnonzero(cls == k)
        need = np.unique(inputs.site_index[assets])
        got = parts.get(code, [])
        sites = np.concatenate([np.asarray(s) for s, _, _ in got] + [np.zeros(0, dtype=need.dtype)])
        ds = np.concatenate([np.asarray(d) for _, d, _ in got] + [np.zeros((0, dss.n_states))])
        eal = np.concatenate([np.asarray(e) for _, _, e in got] + [np.zeros(0)])
        missing = np.setdiff1d(need, sites)
        if missing.size:
            ds_m, eal_m = _pair_kernel(inputs, dss, missing)
            sites, ds, eal = np.concatenate([sites, missing]), np.concatenate([ds, ds_m]), np.concatenate([eal, eal_m])
        sites, first = np.unique(sites, return_index=True)
        pair = np.searchsorted(sites, inputs.site_index[assets])
        out[code] = (assets, ds[first][pair], eal[first][pair])
    return out


def _per_asset(inputs, by_class):
    """Annual collapse rate and EAL ratio of every asset, in exposure order."""
    n = len(inputs.exposure)
    collapse, eal_ratio = np.empty(n), np.empty(n)
    for code, (assets, ds, eal) in by_class.items():
        dss = inputs.library[code]  # a vulnerability class: no collapse figure (NaN)
        collapse[assets] = ds[:, dss.collapse_index] if dss.has_damage_states else np.nan
        eal_ratio[assets] = eal
    return collapse, eal_ratio


# --- screening --------------------------------------------------------------------------------

def _mean_curve_sets(inputs):
    """(statistic, im, levels (m, n), rates (m, n)) of the curves that drive the damage results."""
    model = inputs.hazard_model
    hz = inputs.hazard
    if model is None:
        stat = inputs.config.hazard.statistic
        for im in sorted(set(hz.curves) - hz.interpolated):
            yield (stat, im) + tuple(hz.curves[im])
        return
    levels = np.broadcast_to(model.levels_g, (len(hz.site_id), len(model.levels_g)))
    for i, im in enumerate(model.ims):
        yield "mean", im, levels, model.statistics["mean"][i]


def screening_tables(inputs, collapse_rate):
    r"""``collapse_screening`` (per asset) and ``site_risk_targeted_im`` (per site and IM).

    Per asset: the probability of collapse in the target years (Poisson,
    :math:`P = 1 - e^{-\lambda t}`) against the target probability.  Per site and IM:
    the risk-targeted IM (ASCE 7 Chapter 21 definition, after Luco et al. 2007:
    lognormal collapse fragility with the configured beta and probability at the IM,
    giving the target collapse probability in the target years;
    :func:`quakefolio.core.risk.risk_targeted_im`), the uniform-hazard IM at 2% in 50
    years and their ratio, read off the mean curves.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        After the hazard stage.
    collapse_rate : ndarray (n_assets,) [1/yr]
        The run's annual collapse rate of every asset (exposure order).

    Returns
    -------
    dict name -> pandas.DataFrame
        ``collapse_screening`` and ``site_risk_targeted_im`` (IMs in g, a ``flag`` column
        where a value is not bracketed, outside the curve or below the rate floor).
    """
    cfg = inputs.config
    sc = cfg.screening
    target_p, target_t = sc.collapse_target_prob, sc.collapse_target_years
    ex = inputs.exposure
    # NaN collapse rate (a vulnerability class: no damage states): NaN probability, not screened
    prob = np.where(np.isnan(collapse_rate), np.nan, prob_in_years(np.nan_to_num(collapse_rate), target_t))
    assets = pd.DataFrame({
        "asset_id": ex.asset_id.array, "building_class": ex.building_class.array,
        "site_id": text_series(take_text(text_array(inputs.hazard.site_id), inputs.site_index)).array,
        "annual_collapse_rate": collapse_rate,
        "collapse_prob_in_target_years": prob, "target_prob": target_p, "target_years": target_t,
        "exceeds_target": prob > target_p, "ratio_to_target": prob / target_p,
    })
    uhs_rate = float(rate_from_prob(UHS_PROB, UHS_YEARS))
    below_floor = uhs_rate < cfg.hazard.rate_floor
    frames = []
    for stat, im, x, lam in _mean_curve_sets(inputs):
        rt = risk_targeted_im(x, lam, beta=sc.rt_beta, prob_at_im=sc.rt_prob_at_im, target_prob=target_p,
                              years=target_t, tail=cfg.fragility.tail)
        uhs = np.full(len(rt), np.nan) if below_floor else im_at_rate(uhs_rate, x, lam)
        flag = np.where(np.isnan(rt), "risk_targeted_not_bracketed",
                        np.where(np.isnan(uhs), "below_rate_floor" if below_floor else "uhs_outside_range", "ok"))
        with np.errstate(invalid="ignore"):
            coefficient = rt / uhs
        frames.append(pd.DataFrame({"site_id": inputs.hazard.site_id, "im": im, "statistic": stat,
                                    "risk_targeted_im_g": rt, "im_at_2pct_50yr_g": uhs,
                                    "risk_coefficient": coefficient, "flag": flag}))
    sites = pd.concat(frames, ignore_index=True)
    return {"collapse_screening": assets, "site_risk_targeted_im": sites}


# --- benefit-cost -----------------------------------------------------------------------------

# ``annuity_factor`` and ``present_value`` are :mod:`quakefolio.core.economics`'s, re-exported here.


# --- event-based rerun ------------------------------------------------------------------------

@dataclass
class EventRerun:
    """Event and year losses of the event set under an alternative class assignment."""

    event_id: np.ndarray
    ground_up: np.ndarray  # (n_events,) [currency]
    net: np.ndarray
    year_ground_up: np.ndarray  # (n_years,) aggregate [currency]
    year_net: np.ndarray
    max_event_ground_up: np.ndarray  # (n_years,) largest event [currency]
    max_event_net: np.ndarray
    asset_aal_ground_up: np.ndarray  # (n_assets,) [currency/yr], exposure order
    people_years: np.ndarray = None  # (n_years, 4) annual casualties, downtime, contents, interruption (stages.people)


def rerun_events(em, alternative):
    """Event losses with the alternative's changed assets moved to its new class.

    Same events, same per-event ground-motion models and the same ground-motion fields
    (the event model ``em`` of the run, whose random streams depend only on the seed and
    the event blocks).  The run's class entries are kept as they are, with the changed
    assets' values set to zero there, and the changed assets are appended as extra
    entries of the new class: every other asset sees exactly the same losses, also with
    sampled damage states (whose random streams are per class entry).

    Parameters
    ----------
    em : quakefolio.pipeline.stages.events.EventModel
        The event model of the run.
    alternative : :class:`Alternative`
        The retrofit alternative.

    Returns
    -------
    EventRerun
        Event and year losses [currency] and per-asset AAL [currency/yr] after the change.
    """
    from quakefolio.pipeline.stages import events as ps

    changed = alternative.assets[alternative.changed]
    n = len(em.value)
    extra = n + np.arange(len(changed))
    value = np.concatenate([em.value, em.value[changed]])
    value[changed] = 0.0
    usites, pair = np.unique(em.asset_site[changed], return_inverse=True)
    entry = (alternative.new_class, extra, em.ims.index(alternative.dss.im), alternative.dss, usites, pair.ravel())
    alt = dataclasses.replace(em, value=value, deductible=np.concatenate([em.deductible, em.deductible[changed]]),
                              limit=np.concatenate([em.limit, em.limit[changed]]), classes=list(em.classes) + [entry],
                              group=ps.extended_group(em, changed, alternative.new_class),
                              group_terms=None,  # the what-if compares building losses; no programme terms
                              breakdown=(),  # nor breakdowns by exposure column
                              people=moved_people(em.people, changed, alternative.dss))
    chunks = sorted((ps.event_chunk(alt, c, independent=False) for c in ps.event_chunks(alt)), key=lambda r: r.start)
    gu = np.concatenate([c.ground_up for c in chunks]) if chunks else np.zeros(0)
    net = np.concatenate([c.net for c in chunks]) if chunks else np.zeros(0)
    asset_sum = sum_over_blocks([c.asset_sum for c in chunks]) if chunks else np.zeros((2, n + len(changed)))
    agg_gu, occ_gu = year_loss(em.events.year, gu, em.n_years)
    agg_net, occ_net = year_loss(em.events.year, net, em.n_years)
    people = (year_totals(em.events.year, np.concatenate([c.people for c in chunks]), em.n_years)
              if chunks and em.people is not None else None)
    return EventRerun(em.events.event_id, gu, net, agg_gu, agg_net, occ_gu, occ_net,
                      rerun_asset_aal(asset_sum[0], n, changed, em.n_years), people)


def _event_rows(alt_id, portfolio, rerun, return_periods, cur):
    """whatif_portfolio rows of the event-based metrics: before (the run), after (the rerun)."""
    tables = portfolio[0]
    years = tables["year_loss"].sort_values("year")
    summary = tables["portfolio_summary"].set_index("basis")
    ep = tables["portfolio_ep"]
    rows = []
    for basis, agg, occ in (("ground_up", rerun.year_ground_up, rerun.max_event_ground_up),
                            ("net", rerun.year_net, rerun.max_event_net)):
        aal, se_change = paired_aal_change(years[f"{basis}_loss"].to_numpy(), agg)  # same simulated years
        rows.append(_row(alt_id, "aal", basis, np.nan, f"{cur}/yr", float(summary.loc[basis, "aal"]), aal, se_change))
        b = ep[ep.basis == basis].set_index("return_period_yr")
        after = {"aep_loss": ep_from_years(agg, return_periods), "oep_loss": ep_from_years(occ, return_periods),
                 "tvar_loss": tvar(agg, return_periods)}
        for metric, values in after.items():
            for rp, v in zip(return_periods, values):
                rows.append(_row(alt_id, metric, basis, float(rp), cur, float(b.loc[rp, metric]), float(v)))
    return rows


def _row(alt_id, metric, basis, rp, unit, before, after, se=np.nan):
    """One ``whatif_portfolio`` row: the metric before and after, its change and relative change.

    Parameters
    ----------
    alt_id, metric, basis, unit : str
    rp : float [yr]
        Return period of the metric (NaN when it has none).
    before, after : float [unit]
    se : float [unit]
        Standard error of the change (NaN when not estimated).

    Returns
    -------
    dict
        Column -> value (change and relative change by :func:`quakefolio.core.whatif.change`).
    """
    delta, relative = change(before, after)
    change_value, relative = float(delta), float(relative)
    return {"alternative_id": alt_id, "metric": metric, "basis": basis, "return_period_yr": rp, "unit": unit,
            "value_before": before, "value_after": after, "change": change_value, "relative_change": relative,
            "standard_error_of_change": se}


# --- what-if tables ---------------------------------------------------------------------------

def alternative_tables(inputs, alternatives, by_class, portfolio=None, em=None, people_out=None):
    """``whatif_assets``, ``whatif_asset_damage``, ``whatif_portfolio``, ``whatif_benefit_cost``.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        After the hazard stage.
    alternatives : list of :class:`Alternative`
        From :func:`validate`.
    by_class : dict
        The run's per-asset rates (:func:`_run_asset_rates`): class -> (asset indices,
        damage-state rates (a, n_ds) [1/yr], EAL ratios (a,) [1/yr]).
    portfolio : (dict, dict) or None
        (tables, checks) of the event-based stage, or None.
    em : quakefolio.pipeline.stages.events.EventModel or None
        Event model of the run (prepared here when needed and not given).
    people_out : dict, optional
        Filled with ``ds_after`` (alternative id -> damage-state rates of the selected
        assets after) and ``reruns`` (alternative id -> annual event consequences after,
        :mod:`quakefolio.pipeline.stages.people`).

    Returns
    -------
    dict name -> DataFrame
        Benefit-cost through :mod:`quakefolio.core.economics` (present value of the
        avoided annual loss with the annuity factor of the discount rate and benefit
        horizon).
    """
    cfg = inputs.config
    sc, scen = cfg.screening, cfg.scenario
    cur, horizon = scen.currency, scen.horizon_yr
    rate, years = scen.discount_rate, scen.benefit_horizon_yr
    factor = float(annuity_factor(rate, years))
    ex = inputs.exposure
    ids = ex.asset_id.to_numpy()
    position = pd.Series(np.arange(len(ids)), index=ids)
    classes = ex.building_class.to_numpy()
    value_all = ex.replacement_value.to_numpy()
    site_all = inputs.hazard.site_id[inputs.site_index]
    collapse_all, eal_ratio_all = _per_asset(inputs, by_class)
    collapse_all = np.nan_to_num(collapse_all)  # portfolio collapse totals over the classes with damage states
    targets = {"horizon_yr": horizon, "target_prob": sc.collapse_target_prob,
               "target_years": sc.collapse_target_years}
    rps = np.asarray(cfg.portfolio.return_periods_yr, dtype=float)
    asset_frames, damage_frames, portfolio_rows, bc_frames = [], [], [], []
    for alt in alternatives:
        a = alt.assets
        new = alt.dss
        collapse_after = collapse_all[a].copy()
        eal_ratio_after = eal_ratio_all[a].copy()
        ds_before = _rates_of(by_class, classes, a)  # class -> (positions in a, rates)
        ds_after = np.empty((len(a), new.n_states))
        changed = np.flatnonzero(alt.changed)
        if changed.size:
            usites, pair = np.unique(inputs.site_index[a[changed]], return_inverse=True)
            ds_new, eal_new = _pair_kernel(inputs, new, usites)
            pair = pair.ravel()
            ds_after[changed] = ds_new[pair]
            collapse_after[changed] = ds_new[pair, new.collapse_index]
            eal_ratio_after[changed] = eal_new[pair]
        for code, (pos, r) in ds_before.items():
            keep = ~alt.changed[pos]  # same parameters as the new class, so the same number of states
            if keep.any():
                ds_after[pos[keep]] = r[keep]
        if people_out is not None:
            people_out.setdefault("ds_after", {})[alt.alt_id] = ds_after.copy()
        frames = [_damage_frame(alt.alt_id, ids[a[pos]], "before", code, inputs.library[code].names, r, horizon)
                  for code, (pos, r) in ds_before.items()]
        frames.append(_damage_frame(alt.alt_id, ids[a], "after", alt.new_class, new.names, ds_after, horizon))
        dmg = pd.concat(frames, ignore_index=True)
        order = np.lexsort((dmg.damage_state_index.to_numpy(), (dmg.case == "after").to_numpy(),
                            position.loc[dmg.asset_id].to_numpy()))
        damage_frames.append(dmg.iloc[order])
        m = alternative_change(value_all, eal_ratio_all, collapse_all, a, eal_ratio_after, collapse_after, **targets)
        eal_before, eal_after = m.eal_before, m.eal_after
        p_before, p_after = m.collapse_prob_before, m.collapse_prob_after
        asset_frames.append(pd.DataFrame({
            "alternative_id": alt.alt_id, "asset_id": ids[a], "building_class": classes[a],
            "new_class": alt.new_class, "site_id": site_all[a], "replacement_value": value_all[a],
            "fragility_changed": alt.changed, "eal_before": eal_before, "eal_after": eal_after,
            "eal_reduction": eal_before - eal_after, "annual_collapse_rate_before": collapse_all[a],
            "annual_collapse_rate_after": collapse_after, "collapse_prob_in_horizon_before": p_before,
            "collapse_prob_in_horizon_after": p_after, "collapse_prob_reduction": p_before - p_after,
            "horizon_yr": horizon, "exceeds_collapse_target_before": m.exceeds_target_before,
            "exceeds_collapse_target_after": m.exceeds_target_after,
        }))
        # portfolio metrics (classical: every asset of the exposure, only the selected ones change)
        portfolio_rows += [
            _row(alt.alt_id, "eal", "classical", np.nan, f"{cur}/yr", *m.total_eal),
            _row(alt.alt_id, "expected_collapses_in_horizon", "classical", np.nan, "-", *m.expected_collapses),
            _row(alt.alt_id, "assets_exceeding_collapse_target", "classical", np.nan, "-", *m.assets_exceeding_target),
        ]
        if portfolio is not None:
            if changed.size:
                if em is None:
                    from quakefolio.pipeline.stages.events import prepare_events

                    em = prepare_events(inputs)
                rerun = rerun_events(em, alt)
                if people_out is not None and rerun.people_years is not None:
                    people_out.setdefault("reruns", {})[alt.alt_id] = rerun.people_years
                portfolio_rows += _event_rows(alt.alt_id, portfolio, rerun, rps, cur)
            else:  # nothing changes: the run's own numbers
                portfolio_rows += _unchanged_event_rows(alt.alt_id, portfolio, rps, cur)
        # benefit-cost per asset and in total
        avoided = eal_before - eal_after
        pv = present_value(avoided, rate, years)
        cost = alt.retrofit_cost
        annual_before, annual_after = prob_in_years(collapse_all[a], 1.0), prob_in_years(collapse_after, 1.0)
        bcr = benefit_cost_ratio(pv, cost)
        per_asset = pd.DataFrame({
            "alternative_id": alt.alt_id, "scope": "asset", "asset_id": ids[a].astype(object), "n_assets": 1,
            "retrofit_cost": cost, "eal_before": eal_before, "eal_after": eal_after, "avoided_eal": avoided,
            "discount_rate": rate, "benefit_horizon_yr": years, "annuity_factor_yr": factor,
            "pv_avoided_loss": pv, "net_present_value": pv - cost, "benefit_cost_ratio": bcr,
            "annual_collapse_prob_before": annual_before, "annual_collapse_prob_after": annual_after,
            "avoided_annual_collapse_prob": annual_before - annual_after,
        })
        total = {c: [per_asset[c].sum()] for c in ("n_assets", "retrofit_cost", "eal_before", "eal_after",
                                                   "avoided_eal", "pv_avoided_loss", "net_present_value",
                                                   "annual_collapse_prob_before", "annual_collapse_prob_after",
                                                   "avoided_annual_collapse_prob")}
        total_row = pd.DataFrame({"alternative_id": [alt.alt_id], "scope": ["alternative"], "asset_id": [None],
                                  **total, "discount_rate": [rate], "benefit_horizon_yr": [years],
                                  "annuity_factor_yr": [factor],
                                  "benefit_cost_ratio": [benefit_cost_ratio(total["pv_avoided_loss"][0],
                                                                            total["retrofit_cost"][0])[()]]})
        bc_frames += [total_row[per_asset.columns], per_asset]
    bc = pd.concat(bc_frames, ignore_index=True)
    bc["n_assets"] = bc["n_assets"].astype(np.int64)
    return {
        "whatif_assets": pd.concat(asset_frames, ignore_index=True),
        "whatif_asset_damage": pd.concat(damage_frames, ignore_index=True),
        "whatif_portfolio": pd.DataFrame(portfolio_rows),
        "whatif_benefit_cost": bc,
    }


def _rates_of(by_class, classes, a):
    """The run's damage-state rates of assets ``a``, per current class: class -> (positions in a, rates)."""
    out = {}
    for code in sorted(set(classes[a])):
        pos = np.flatnonzero(classes[a] == code)
        assets, ds, _ = by_class[code]
        out[code] = (pos, ds[np.searchsorted(assets, a[pos])])
    return out


def _damage_frame(alt_id, asset_ids, case, code, names, rates, horizon):
    n, n_ds = rates.shape
    return pd.DataFrame({
        "alternative_id": alt_id, "asset_id": np.repeat(asset_ids, n_ds), "case": case, "building_class": code,
        "damage_state": np.tile(np.array(names, dtype=object), n),
        "damage_state_index": np.tile(np.arange(1, n_ds + 1, dtype=np.int32), n),
        "annual_rate_exceed": rates.ravel(), "prob_exceed_in_horizon": prob_in_years(rates, horizon).ravel(),
        "horizon_yr": horizon})


def _unchanged_event_rows(alt_id, portfolio, return_periods, cur):
    tables = portfolio[0]
    summary = tables["portfolio_summary"].set_index("basis")
    ep = tables["portfolio_ep"]
    rows = []
    for basis in ("ground_up", "net"):
        aal = float(summary.loc[basis, "aal"])
        rows.append(_row(alt_id, "aal", basis, np.nan, f"{cur}/yr", aal, aal, 0.0))
        b = ep[ep.basis == basis].set_index("return_period_yr")
        for metric in ("aep_loss", "oep_loss", "tvar_loss"):
            for rp in return_periods:
                v = float(b.loc[rp, metric])
                rows.append(_row(alt_id, metric, basis, float(rp), cur, v, v))
    return rows


def evaluate(inputs, results, portfolio=None, em=None):
    """The screening-and-what-if stage: a dict of tables for the run store.

    Parameters
    ----------
    inputs : :class:`quakefolio.pipeline.stages.products.RunInputs`
        After the hazard stage.
    results : list of BlockResult
        The damage stage's block results.
    portfolio : (dict, dict) or None
        (tables, checks) of the event-based stage, or None.
    em : quakefolio.pipeline.stages.events.EventModel or None
        The event stage's event model, if at hand (otherwise prepared again when an
        alternative needs the events: same seed, same events).

    Returns
    -------
    dict name -> DataFrame
        ``collapse_screening``, ``site_risk_targeted_im`` always; ``whatif_assets``,
        ``whatif_asset_damage``, ``whatif_portfolio``, ``whatif_benefit_cost`` and
        ``whatif_fragility`` (the new classes' parameters) when the config has alternatives.
    """
    alternatives = validate(inputs)
    by_class = _run_asset_rates(inputs, results)
    collapse, _ = _per_asset(inputs, by_class)
    tables = screening_tables(inputs, collapse)
    if alternatives:
        people = {}
        tables.update(alternative_tables(inputs, alternatives, by_class, portfolio, em, people))
        tables.update(whatif_people_tables(inputs, alternatives, by_class, people["ds_after"], portfolio,
                                           people.get("reruns")))
        add_benefits(tables, inputs)
        tables["whatif_fragility"] = new_class_frame([(a.alt_id, a.new_class, a.dss) for a in alternatives])
    return tables
