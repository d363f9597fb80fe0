"""Units and descriptions of the run-store tables (written into each file's schema metadata)."""

TABLES = {
    "site_hazard": dict(
        description="Tabulated site hazard curves used by the run (long form).",
        units={"im_level": "g", "annual_rate": "1/yr"},
    ),
    "hazard_at_return_periods": dict(
        description="Uniform-hazard IM values per site, IM and return period; NaN with a flag where the "
                    "rate lies outside the tabulated curve or below the rate floor.",
        units={"return_period_yr": "yr", "im_level": "g"},
    ),
    "disaggregation": dict(
        description="Share of the mean-hazard exceedance rate at each return-period level by magnitude, "
                    "distance (Rrup) and epsilon bin (shares above 1e-6 listed; all shares sum to 1 per site, "
                    "IM and return period).",
        units={"return_period_yr": "yr", "im_level": "g", "mag_lo": "Mw", "mag_hi": "Mw", "dist_lo_km": "km",
               "dist_hi_km": "km", "eps_lo": "-", "eps_hi": "-", "share": "-"},
    ),
    "disaggregation_summary": dict(
        description="Mean and modal magnitude, distance (Rrup) and epsilon of the disaggregation.",
        units={"return_period_yr": "yr", "im_level": "g", "mean_mag": "Mw", "mean_dist_km": "km", "mean_eps": "-",
               "mode_mag": "Mw", "mode_dist_km": "km", "mode_eps": "-"},
    ),
    "asset_damage": dict(
        description="Per asset and damage state: annual rate of reaching or exceeding the state and its "
                    "probability in the horizon (Poisson); extrapolated tail shares as diagnostics.",
        units={"annual_rate_exceed": "1/yr", "return_period_yr": "yr", "prob_exceed_in_horizon": "-",
               "horizon_yr": "yr", "tail_share_below": "-", "tail_share_above": "-"},
    ),
    "asset_loss": dict(
        description="Per asset: expected annual loss (classical, exact under log-log hazard interpolation), "
                    "ground-up (eal) and net of the asset's per-event deductible and limit (eal_net: the "
                    "expected payment over the beta-distributed loss ratio of each damage state, closed form "
                    "by the incomplete-beta identity, never the terms applied to the mean loss), and annual "
                    "collapse rate and probability in the horizon.",
        units={"site_distance_km": "km", "replacement_value": "{currency}", "eal": "{currency}/yr",
               "eal_net": "{currency}/yr",
               "eal_ratio": "1/yr", "annual_collapse_rate": "1/yr", "collapse_prob_in_horizon": "-",
               "horizon_yr": "yr", "max_tail_share": "-"},
    ),
    "asset_damage_fractiles": dict(
        description="Logic-tree fractiles of per-asset damage-state rates (every hazard branch propagated "
                    "through the fragility integral; weighted inverse-CDF fractiles).",
        units={"annual_rate_exceed": "1/yr", "prob_exceed_in_horizon": "-"},
    ),
    "asset_loss_fractiles": dict(
        description="Logic-tree fractiles of per-asset expected annual loss.",
        units={"eal": "{currency}/yr", "eal_ratio": "1/yr"},
    ),
    "asset_loss_curve": dict(
        description="Per asset: annual rate at which the loss exceeds each loss ratio (beta-distributed "
                    "loss ratio per damage state).",
        units={"loss_ratio": "-", "loss": "{currency}", "annual_rate_exceed": "1/yr"},
    ),
    "change_assets": dict(
        description="Change report, per asset of the union of two runs (A, B): status (added, removed, kept), "
                    "class, site and value in each run; EAL, annual collapse rate and collapse probability in the "
                    "horizon in A and B with changes (relative change NaN where A is zero or absent; an added or "
                    "removed asset counts as zero EAL in the run without it); the exact split "
                    "eal_change = eal_change_from_value + eal_change_from_ratio for kept assets; cause flags "
                    "(hazard, fragility, exposure, settings), the ordered causes and the primary cause "
                    "(unchanged when neither results nor causes changed, unexplained when results changed "
                    "without a cause). Class and site are null in the run without the asset.",
        units={"site_distance_km_a": "km", "site_distance_km_b": "km", "replacement_value_a": "{currency}",
               "replacement_value_b": "{currency}", "eal_a": "{currency}/yr", "eal_b": "{currency}/yr",
               "eal_change": "{currency}/yr", "eal_relative_change": "-", "eal_change_from_value": "{currency}/yr",
               "eal_change_from_ratio": "{currency}/yr", "annual_collapse_rate_a": "1/yr",
               "annual_collapse_rate_b": "1/yr", "annual_collapse_rate_change": "1/yr",
               "collapse_prob_in_horizon_a": "-", "collapse_prob_in_horizon_b": "-",
               "collapse_prob_in_horizon_change": "-", "horizon_yr_a": "yr", "horizon_yr_b": "yr"},
    ),
    "change_asset_damage": dict(
        description="Change report, per asset and damage state (matched by name) of two runs (A, B): annual rate "
                    "of reaching or exceeding the state and its probability in each run's horizon, with absolute "
                    "and relative changes (NaN where the state is absent from a run; relative change NaN where "
                    "A is zero).",
        units={"annual_rate_exceed_a": "1/yr", "annual_rate_exceed_b": "1/yr", "annual_rate_exceed_change": "1/yr",
               "annual_rate_exceed_relative_change": "-", "prob_exceed_in_horizon_a": "-",
               "prob_exceed_in_horizon_b": "-", "prob_exceed_in_horizon_change": "-",
               "prob_exceed_in_horizon_relative_change": "-"},
    ),
    "change_portfolio": dict(
        description="Change report, portfolio metrics of two runs (A, B), long form: asset count, total "
                    "replacement value, classical EAL; when both runs hold event-based tables, AAL per basis with "
                    "standard errors (combined = root sum of squares, as for independent simulations; "
                    "versus_standard_error says whether the change exceeds it) and PML on the AEP and OEP curves "
                    "and TVaR per return period and basis. Each row's unit is in its unit column.",
        units={"return_period_yr": "yr", "value_a": "see column unit", "value_b": "see column unit",
               "change": "see column unit", "relative_change": "-", "standard_error_a": "see column unit",
               "standard_error_b": "see column unit", "combined_standard_error": "see column unit"},
    ),
}

TABLES.update({
    "event_loss": dict(
        description="Event loss table: one row per simulated event (Poisson occurrences of every rupture of the "
                    "event-set source branch over the simulated years), with the ground-motion model drawn for it.",
        units={"magnitude": "Mw", "ground_up_loss": "{currency}", "net_loss": "{currency}"},
    ),
    "year_loss": dict(
        description="Year loss table: aggregate and largest event loss of every simulated year.",
        units={"ground_up_loss": "{currency}", "net_loss": "{currency}", "max_event_ground_up_loss": "{currency}",
               "max_event_net_loss": "{currency}"},
    ),
    "portfolio_ep": dict(
        description="Portfolio PML at the configured return periods: aggregate (AEP) and occurrence (OEP) "
                    "exceedance losses, the order statistic of rank ceil(N/T); TVaR (expected shortfall of "
                    "annual aggregate loss, Acerbi & Tasche 2002).",
        units={"return_period_yr": "yr", "aep_loss": "{currency}", "oep_loss": "{currency}",
               "tvar_loss": "{currency}"},
    ),
    "portfolio_ep_curve": dict(
        description="Full empirical exceedance-probability curves (AEP and OEP) of the simulated years.",
        units={"loss": "{currency}", "annual_exceedance_prob": "1/yr", "return_period_yr": "yr"},
    ),
    "portfolio_summary": dict(
        description="Average annual loss with its standard error (sample standard deviation of year losses / "
                    "sqrt(N)), event and year counts, seed, and the classical EAL of the same model (per basis: "
                    "ground-up, and net of the per-event terms).",
        units={"aal": "{currency}/yr", "aal_standard_error": "{currency}/yr",
               "classical_eal_same_branch": "{currency}/yr"},
    ),
    "asset_event_loss": dict(
        description="Per asset: event-based AAL (ground-up, net) with its standard error (compound Poisson), the "
                    "classical EAL of the same source branch and GMM weights, and their z-score.",
        units={"aal_ground_up": "{currency}/yr", "aal_net": "{currency}/yr",
               "aal_ground_up_standard_error": "{currency}/yr", "classical_eal_same_branch": "{currency}/yr",
               "z_score": "-"},
    ),
    "portfolio_breakdown": dict(
        description="Event-based AAL by building class and by seismic source.",
        units={"aal_ground_up": "{currency}/yr", "aal_net": "{currency}/yr"},
    ),
})

TABLES.update({
    "collapse_screening": dict(
        description="Collapse-risk screening per asset: the run's annual collapse rate and its Poisson probability "
                    "in the target period against the target probability ([screening]; default 1% in 50 years, "
                    "the collapse target of ASCE/SEI 7-16 Chapter 21); exceeds_target and ratio_to_target "
                    "(probability / target).",
        units={"annual_collapse_rate": "1/yr", "collapse_prob_in_target_years": "-", "target_prob": "-",
               "target_years": "yr", "ratio_to_target": "-"},
    ),
    "site_risk_targeted_im": dict(
        description="Per hazard site and IM: the risk-targeted IM of the curve that drives the damage results "
                    "(generic lognormal collapse fragility with dispersion rt_beta and probability rt_prob_at_im "
                    "at that IM giving the target collapse probability; ASCE/SEI 7-16 Section 21.2.1.2 after "
                    "Luco et al. 2007), the uniform-hazard IM of 2% in 50 years and their ratio (risk "
                    "coefficient). NaN with a flag where the target cannot be bracketed or the 2%-in-50-years rate "
                    "lies outside the curve.",
        units={"risk_targeted_im_g": "g", "im_at_2pct_50yr_g": "g", "risk_coefficient": "-"},
    ),
    "whatif_assets": dict(
        description="Retrofit what-if, per alternative and selected asset: class before and after, EAL, annual "
                    "collapse rate, collapse probability in the horizon and the collapse-target flag, before (the "
                    "run) and after (the new class; recomputed per unique site and class pair). "
                    "fragility_changed is false where the new class has the same parameters (nothing recomputed).",
        units={"replacement_value": "{currency}", "eal_before": "{currency}/yr", "eal_after": "{currency}/yr",
               "eal_reduction": "{currency}/yr", "annual_collapse_rate_before": "1/yr",
               "annual_collapse_rate_after": "1/yr", "collapse_prob_in_horizon_before": "-",
               "collapse_prob_in_horizon_after": "-", "collapse_prob_reduction": "-", "horizon_yr": "yr"},
    ),
    "whatif_asset_damage": dict(
        description="Retrofit what-if, per alternative, selected asset and damage state of its class before and "
                    "after: annual rate of reaching or exceeding the state and its probability in the horizon.",
        units={"annual_rate_exceed": "1/yr", "prob_exceed_in_horizon": "-", "horizon_yr": "yr"},
    ),
    "whatif_portfolio": dict(
        description="Retrofit what-if, portfolio metrics before (the run) and after each alternative, long form: "
                    "classical EAL, expected number of collapses in the horizon (sum of probabilities), assets "
                    "above the collapse target; in event-based runs AAL per basis (standard error of the change "
                    "from the paired year losses: same events and ground-motion fields) and PML on the AEP and "
                    "OEP curves and TVaR per return period and basis. Each row's unit is in its unit column.",
        units={"return_period_yr": "yr", "value_before": "see column unit", "value_after": "see column unit",
               "change": "see column unit", "relative_change": "-", "standard_error_of_change": "see column unit"},
    ),
    "whatif_benefit_cost": dict(
        description="Retrofit what-if benefit-cost, per alternative (scope 'alternative', sums over its assets) "
                    "and per asset (scope 'asset'): retrofit cost, avoided EAL, present value of the avoided EAL "
                    "over the benefit horizon at the discount rate (ordinary annuity, PV = avoided EAL x "
                    "(1 - (1 + r)^-T) / r, or x T at r = 0), net present value, benefit-cost ratio (PV / cost) and "
                    "the annual collapse probability before and after (for scope 'alternative' the sums: expected "
                    "collapses per year).",
        units={"retrofit_cost": "{currency}", "eal_before": "{currency}/yr", "eal_after": "{currency}/yr",
               "avoided_eal": "{currency}/yr", "discount_rate": "1/yr", "benefit_horizon_yr": "yr",
               "annuity_factor_yr": "yr", "pv_avoided_loss": "{currency}", "net_present_value": "{currency}",
               "benefit_cost_ratio": "-", "annual_collapse_prob_before": "-", "annual_collapse_prob_after": "-",
               "avoided_annual_collapse_prob": "-"},
    ),
})

TABLES.update({
    "run_assets": dict(
        description="The assets this run used: the validated exposure as read (one row per asset, exposure "
                    "order; optional columns NaN where not given). Positions in WGS84 degrees.",
        units={"lon": "deg", "lat": "deg", "replacement_value": "{currency}", "vs30_mps": "m/s", "occupants": "-",
               "deductible": "{currency}", "limit": "{currency}"},
    ),
    "run_fragility": dict(
        description="The fragility and consequence model of every building class this run used, long form: one "
                    "row per class and damage state in severity order (damage_state_index from 0); lognormal "
                    "fragility P(DS >= ds | IM) = Phi(ln(IM / median) / beta) with the median in the units of the "
                    "class's IM; mean damage ratio (repair cost / replacement value) with the CoV of the loss "
                    "ratio (0: deterministic); downtime and casualty rate NaN where not given; "
                    "is_collapse_state marks the state counted as collapse.",
        units={"median": "g", "beta": "-", "mean_damage_ratio": "-", "cov": "-", "downtime_days": "days",
               "casualty_rate": "-", "damage_state_index": "-", "n_states": "-"},
    ),
})


def units_for(name, currency):
    """Column units of a run table, with ``{currency}`` replaced by the run's currency.

    Parameters
    ----------
    name : str
        A table name of :data:`TABLES`.
    currency : str
        Currency code of the run (e.g. ``"EUR"``).

    Returns
    -------
    dict of str -> str
        Column name -> unit.
    """
    return {k: v.replace("{currency}", currency) for k, v in TABLES[name]["units"].items()}
