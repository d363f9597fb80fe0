"""Units and descriptions of the run-store tables (written into each file's schema metadata)."""

TABLES = {
    "hazard_sites": dict(
        description="One row per hazard site: position (WGS84), in compute mode the site condition the "
                    "ground-motion models used (vs30_mps: the asset's own Vs30, or the geometric mean of the Vs30 of "
                    "the assets snapped to a grid node; [hazard] default_vs30_mps for assets without one, counted in "
                    "n_assets_default_vs30), the assets mapped to the site and the farthest one's distance (0 for "
                    "a site without assets).",
        units={"lon": "deg", "lat": "deg", "vs30_mps": "m/s", "n_assets_default_vs30": "-", "n_assets": "-",
               "max_asset_distance_km": "km"},
    ),
    "source_faults": dict(
        description="Compute mode: the fault traces of the source models, one row per trace point in the order "
                    "given (source_branch, source_id, tectonic region, point_index); areas and points are not "
                    "listed. Drawn on the report's map.",
        units={"point_index": "-", "lon": "deg", "lat": "deg"},
    ),
    "site_hazard": dict(
        description="Site hazard curves used by the run (long form): tabulated, or computed (the mean and the "
                    "weighted fractiles over every logic-tree combination of a source-model branch and one "
                    "ground-motion model per tectonic region, or their seeded sample).",
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
                    "IM and return period). Epsilon is the one needed to reach the target level: "
                    "(ln im_level - mean ln IM) / sigma ln IM of the ground-motion model for the rupture and site.",
        units={"return_period_yr": "yr", "im_level": "g", "mag_lo": "Mw", "mag_hi": "Mw", "dist_lo_km": "km",
               "dist_hi_km": "km", "eps_lo": "-", "eps_hi": "-", "share": "-"},
    ),
    "disaggregation_summary": dict(
        description="Mean and modal magnitude, distance (Rrup) and epsilon of the disaggregation. Means are exact: "
                    "weighted by each (rupture, site) pair's rate of exceeding the target level (rupture rate x "
                    "P(IM > im_level)) over every pair and logic-tree branch, not taken from bin centres; modes "
                    "are the centres of the most contributing bin. Epsilon is the one needed to reach the target "
                    "level: (ln im_level - mean ln IM) / sigma ln IM of the ground-motion model.",
        units={"return_period_yr": "yr", "im_level": "g", "mean_mag": "Mw", "mean_dist_km": "km", "mean_eps": "-",
               "mode_mag": "Mw", "mode_dist_km": "km", "mode_eps": "-"},
    ),
    "conditional_mean_spectrum": dict(
        description="Conditional mean spectrum (Baker 2011) per site, conditioning IM and return period T: target_g "
                    "is the mean hazard curve's IM at rate 1/T; mean_mag, mean_dist_km (Rrup) and mean_eps are the "
                    "exact disaggregation means at the target (as in disaggregation_summary). The scenario's ln "
                    "median and sigma at each period are the same rate-weighted means (weight: logic-tree weight x "
                    "rupture rate x P(IM > target)) of the ground-motion models' values for every (rupture, site) "
                    "pair and branch; scenario_eps = (ln target_g - scenario ln median) / scenario_sigma at the "
                    "conditioning IM; cms_g = exp(ln scenario_median_g + correlation x scenario_eps x "
                    "scenario_sigma), conditional_sigma = scenario_sigma x sqrt(1 - correlation^2), correlation from "
                    "Baker & Jayaram (2008). Periods: those every ground-motion branch tabulates within 0.01-10 s, "
                    "and the conditioning IM (period_s 0 for PGA). NaN unless flag is ok.",
        units={"return_period_yr": "yr", "target_g": "g", "mean_mag": "Mw", "mean_dist_km": "km", "mean_eps": "-",
               "scenario_eps": "-", "period_s": "s", "correlation": "-", "scenario_median_g": "g",
               "scenario_sigma": "ln units", "cms_g": "g", "conditional_sigma": "ln units"},
    ),
    "asset_damage": dict(
        description="Per asset and damage state: annual rate of reaching or exceeding the state and its "
                    "probability in the horizon (Poisson); extrapolated tail shares as diagnostics. Assets of a "
                    "class given by a vulnerability table (run_vulnerability) have no damage states, hence no rows.",
        units={"annual_rate_exceed": "1/yr", "return_period_yr": "yr", "prob_exceed_in_horizon": "-",
               "horizon_yr": "yr", "tail_share_below": "-", "tail_share_above": "-"},
    ),
    "asset_loss": dict(
        description="Per asset: expected annual loss (classical, exact under log-log hazard interpolation), "
                    "ground-up (eal) and net of the asset's per-event deductible and limit (eal_net: the "
                    "expected payment over the beta-distributed loss ratio of each damage state, closed form "
                    "by the incomplete-beta identity, never the terms applied to the mean loss), and annual "
                    "collapse rate and probability in the horizon. For a class given by a vulnerability table "
                    "the expectations run over its beta loss ratio at each IM, and the collapse figures are NaN "
                    "(no damage states: no collapse figure, not zero).",
        units={"site_distance_km": "km", "replacement_value": "{currency}", "eal": "{currency}/yr",
               "eal_net": "{currency}/yr",
               "eal_ratio": "1/yr", "annual_collapse_rate": "1/yr", "collapse_prob_in_horizon": "-",
               "horizon_yr": "yr", "max_tail_share": "-"},
    ),
    "asset_damage_fractiles": dict(
        description="Logic-tree fractiles of per-asset damage-state rates (the combinations of the hazard "
                    "fractiles propagated through the fragility integral; weighted inverse-CDF fractiles).",
        units={"annual_rate_exceed": "1/yr", "prob_exceed_in_horizon": "-"},
    ),
    "asset_loss_fractiles": dict(
        description="Logic-tree fractiles of per-asset expected annual loss (over the combinations of the "
                    "hazard fractiles).",
        units={"eal": "{currency}/yr", "eal_ratio": "1/yr"},
    ),
    "asset_loss_curve": dict(
        description="Per asset (one row each, exposure order): its replacement value and the annual rate at which "
                    "its loss ratio exceeds each configured loss ratio ([output] loss_curve_ratios), one column "
                    "annual_rate_exceed_lr_<ratio> per ratio (beta-distributed loss ratio per damage state); the loss "
                    "at a ratio is ratio x replacement_value.",
        units={"replacement_value": "{currency}", "annual_rate_exceed_lr_*": "1/yr"},
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
        description="Event loss table: one row per simulated event (Poisson occurrences of the ruptures of the "
                    "simulated year's source branch), with its ground-motion model. Whole logic tree (default): "
                    "source_branch names the year's source-model branch and rupture_id is the rupture's index within "
                    "it; per-branch mode: one source branch (no source_branch column), the model drawn per event.",
        units={"magnitude": "Mw", "ground_up_loss": "{currency}", "net_loss": "{currency}"},
    ),
    "year_loss": dict(
        description="Year loss table: aggregate and largest event loss of every simulated year; whole logic tree: "
                    "the year's branch combination (source_branch, gmm).",
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
        description="Average annual loss with its standard error, event and year counts, seed, the loss model "
                    "with its within-group correlation of sampled damage and the grouping column (NaN and empty for "
                    "mean damage ratios), and the classical EAL of the same model. Whole logic tree (source_branch "
                    "'all'): the pooled years of every branch combination (the weighted-mean EP), standard error "
                    "compound Poisson sqrt(sum of squared event losses) / N, classical EAL of every branch by weight "
                    "(column name kept); per-branch mode: standard error s / sqrt(N) of the year losses, classical "
                    "EAL of the source branch. The classical EAL is per basis: ground-up, and net of the per-event "
                    "terms (sum of asset_loss.eal_net of the same model).",
        units={"aal": "{currency}/yr", "aal_standard_error": "{currency}/yr",
               "classical_eal_same_branch": "{currency}/yr", "secondary_correlation": "-"},
    ),
    "asset_event_loss": dict(
        description="Per asset: event-based AAL (ground-up, net) with its standard error (compound Poisson), the "
                    "classical EAL of the same model (whole logic tree: every branch by weight; per-branch mode: the "
                    "source branch with GMM weights), and their z-score.",
        units={"aal_ground_up": "{currency}/yr", "aal_net": "{currency}/yr",
               "aal_ground_up_standard_error": "{currency}/yr", "classical_eal_same_branch": "{currency}/yr",
               "z_score": "-"},
    ),
    "portfolio_breakdown": dict(
        description="Event-based AAL by building class and by seismic source.",
        units={"aal_ground_up": "{currency}/yr", "aal_net": "{currency}/yr"},
    ),
    "breakdown_ep": dict(
        description="Per exposure column of [output] breakdown_columns, group (a distinct value of the column) and "
                    "basis (ground-up; net of the per-asset deductibles and limits): the group's assets, its "
                    "event-based AAL and, at the configured return periods, the PML on the aggregate (AEP) and "
                    "occurrence (OEP) curves of the group's own year losses and the TVaR of its annual aggregate "
                    "loss (the estimators of portfolio_ep). AALs add up over the groups of a column; PML and TVaR "
                    "do not (diversification).",
        units={"n_assets": "-", "aal": "{currency}/yr", "return_period_yr": "yr", "aep_loss": "{currency}",
               "oep_loss": "{currency}", "tvar_loss": "{currency}"},
    ),
    "portfolio_branch_summary": dict(
        description="Whole logic tree: per branch combination (source-model branch x ground-motion model) and "
                    "basis, its weight, simulated years (the weight's share of N) and events, AAL of its own years "
                    "with the compound-Poisson standard error, its classical EAL (ground-up; NaN for net) and the "
                    "z-score between them.",
        units={"weight": "-", "aal": "{currency}/yr", "aal_standard_error": "{currency}/yr",
               "classical_eal": "{currency}/yr", "z_score": "-"},
    ),
    "portfolio_branch_ep": dict(
        description="Whole logic tree: PML on the AEP and OEP curves and TVaR of each branch combination's own "
                    "years at the configured return periods (NaN where the return period exceeds its years).",
        units={"weight": "-", "return_period_yr": "yr", "aep_loss": "{currency}", "oep_loss": "{currency}",
               "tvar_loss": "{currency}"},
    ),
    "portfolio_branch_fractiles": dict(
        description="Whole logic tree: weighted fractiles across branch combinations ([hazard] fractiles; the "
                    "smallest branch value whose cumulative weight reaches the fractile) of AAL (return_period_yr "
                    "NaN) and of PML (aep_loss, oep_loss) and TVaR per return period; NaN where a branch has fewer "
                    "years than the return period.",
        units={"return_period_yr": "yr", "fractile": "-", "value": "{currency} ({currency}/yr for aal)"},
    ),
    "portfolio_correlation_effect": dict(
        description="Sampled damage with a within-group correlation above 0: AAL, PML (AEP, OEP) and TVaR with "
                    "that correlation against independent draws on the same events and ground motions; change and "
                    "relative change from independent to correlated; the standard error of the change: for the "
                    "AAL from paired years (its expectation is 0), for PML and TVaR by batch means over 10 "
                    "batches of paired years (NaN where a batch is shorter than the return period).",
        units={"return_period_yr": "yr", "value_correlated": "{currency} ({currency}/yr for aal)",
               "value_independent": "{currency} ({currency}/yr for aal)",
               "change": "{currency} ({currency}/yr for aal)", "relative_change": "-",
               "standard_error_of_change": "{currency} ({currency}/yr for aal)", "secondary_correlation": "-"},
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


# Programme terms above the building (pipeline/stages/programme.py; [programme] of the config). The loss
# entering group terms is each building's net loss (after its own deductible and limit); the loss entering
# the layers is the programme loss: the portfolio net loss of each event after building and group terms.
TABLES.update({
    "programme_summary": dict(
        description="Event-based AAL of the portfolio net loss after building terms (basis 'net') and after "
                    "building and group terms (basis 'programme', the loss entering the layers), with the "
                    "standard error and the largest event loss of the simulation.",
        units={"aal": "{currency}/yr", "aal_standard_error": "{currency}/yr", "max_event_loss": "{currency}",
               "n_years": "yr", "n_groups": "-"},
    ),
    "group_loss": dict(
        description="Per terms group (exposure column terms_group): assets, per-event deductible and limit "
                    "(NaN: none) applied to the sum of the group's building net losses in each event, and the "
                    "event-based AAL before and after the group terms.",
        units={"n_assets": "-", "deductible": "{currency}", "limit": "{currency}",
               "aal_before_group_terms": "{currency}/yr", "aal_after_group_terms": "{currency}/yr"},
    ),
    "layer_event_loss": dict(
        description="Occurrence layers, per layer and event whose programme loss exceeds the attachment: "
                    "programme loss, loss to the layer before the annual reinstatement cap "
                    "(min(max(loss - attachment, 0), limit)) and after it (cap limit x (1 + reinstatements) "
                    "per year, spent in event order within the year).",
        units={"year": "-", "programme_loss": "{currency}", "layer_loss_before_cap": "{currency}",
               "layer_loss": "{currency}"},
    ),
    "layer_year_loss": dict(
        description="Per layer and simulated year in which the layer pays: the loss entering the layer (largest "
                    "event programme loss of the year for occurrence layers; annual sum of the programme loss for "
                    "aggregate layers) and the annual loss to the layer. Years not listed pay 0.",
        units={"year": "-", "entering_loss": "{currency}", "layer_loss": "{currency}"},
    ),
    "layer_summary": dict(
        description="Per layer: terms (limit inf: unlimited; reinstatements NaN: unlimited; annual_cap = limit x "
                    "(1 + reinstatements), inf without a cap), expected annual layer loss with its standard error, "
                    "annual probability of attachment (a year in which the layer pays), of exhaustion (a year in "
                    "which one event, or the annual sum for aggregate layers, uses the whole limit) and of using "
                    "up the annual cap (NaN without a finite cap), as counts of simulated years / years.",
        units={"attachment": "{currency}", "limit": "{currency}", "reinstatements": "-", "annual_cap": "{currency}",
               "expected_annual_loss": "{currency}/yr", "expected_annual_loss_standard_error": "{currency}/yr",
               "prob_attachment": "-", "prob_exhaustion": "-", "prob_annual_cap_used": "-",
               "n_years": "yr"},
    ),
    "layer_ep": dict(
        description="Per layer and configured return period: annual layer loss exceeded with probability 1/T "
                    "(AEP), largest single-event layer loss of a year (OEP; occurrence layers, NaN for aggregate) "
                    "and TVaR of the annual layer loss (same estimators as portfolio_ep; NaN where T exceeds the "
                    "simulated years).",
        units={"return_period_yr": "yr", "aep_layer_loss": "{currency}", "oep_layer_loss": "{currency}",
               "tvar_layer_loss": "{currency}"},
    ),
})

# People and time (pipeline/stages/people.py): casualties, downtime, contents and interruption losses.
TABLES["run_assets"]["units"].update({"contents_value": "{currency}", "interruption_value_per_day": "{currency}/day"})
TABLES["run_fragility"]["units"].update({"contents_damage_ratio": "-"})
TABLES["run_vulnerability"] = dict(
    description="The vulnerability tables of the building classes this run used that are given without damage "
                "states (written only when there is such a class): one row per class and IM level in increasing "
                "order (row_index from 0); mean loss ratio (repair cost / replacement value) and its CoV at the "
                "level; between levels both are linear in ln IM, 0 below the first level, held above the last; "
                "the loss ratio at an IM is beta-distributed with that mean and CoV. Such classes have no rows in "
                "run_fragility or asset_damage and NaN collapse figures in asset_loss.",
    units={"im_level": "g", "mean_loss_ratio": "-", "cov": "-", "row_index": "-"},
)
_PEOPLE_UNITS = {"casualties": "persons", "downtime_days": "building-days", "contents_loss": "{currency}",
                 "interruption_loss": "{currency}", "present_fraction": "-"}
TABLES.update({
    "asset_consequences": dict(
        description="Per asset, classical annual expectations of the same model as the EAL: casualties = "
                    "occupants x mean fraction present x sum over states of (rate of being in the state) x "
                    "casualty_rate; downtime = sum of (rate in state) x downtime_days; contents EAL = contents value "
                    "x sum of (rate in state) x contents_damage_ratio; interruption EAL = downtime x value of a day; "
                    "total EAL over the three coverages (ground-up). NaN where an input is not given.",
        units={"occupants": "persons", "mean_present_fraction": "-", "expected_annual_casualties": "persons/yr",
               "expected_annual_downtime_days": "building-days/yr", "building_eal": "{currency}/yr",
               "contents_value": "{currency}", "contents_eal": "{currency}/yr",
               "interruption_value_per_day": "{currency}/day", "interruption_eal": "{currency}/yr",
               "total_eal": "{currency}/yr"},
    ),
    "portfolio_consequences": dict(
        description="Portfolio totals of the classical annual expectations of asset_consequences, one row per "
                    "metric (casualties, downtime, losses by coverage: building, contents, interruption), with the "
                    "assets counted and left out (inputs not given) and how terms apply to the coverage.",
        units={"classical_annual_mean": "see column unit", "assets_counted": "-", "assets_left_out": "-"},
    ),
    "event_consequences": dict(
        description="Per event of the event set: casualties (expected over damage states at the sampled intensity, "
                    "times the fraction of occupants present in the event's period of the day), downtime, contents "
                    "and interruption losses (ground-up).",
        units=_PEOPLE_UNITS,
    ),
    "consequence_ep": dict(
        description="Casualties, downtime, contents and interruption losses at the configured return periods: "
                    "aggregate annual (AEP) and largest-event (OEP) values and TVaR of the annual totals.",
        units={"return_period_yr": "yr", "aep_value": "see column unit", "oep_value": "see column unit",
               "tvar_value": "see column unit"},
    ),
    "consequence_event_summary": dict(
        description="Event-based annual averages of casualties, downtime, contents and interruption losses with "
                    "their standard errors, against the classical expectation of the same model (every logic-tree "
                    "branch by weight; in per-branch mode the source branch with the ground-motion weights; column "
                    "name kept) and the z-score.",
        units={"annual_average": "see column unit", "standard_error": "see column unit",
               "classical_same_branch": "see column unit", "z": "-"},
    ),
    "whatif_fragility": dict(
        description="Retrofit what-if: the fragility and consequence parameters of each alternative's new class "
                    "(columns of run_fragility after alternative_id; one row per alternative and damage state), "
                    "so the report draws the retrofit curves beside the original class's.",
        units={"median": "g", "beta": "-", "mean_damage_ratio": "-", "cov": "-", "downtime_days": "days",
               "casualty_rate": "-", "contents_damage_ratio": "-"},
    ),
    "whatif_people": dict(
        description="Retrofit what-if per alternative (scope 'alternative', sums) and selected asset: classical "
                    "casualties, downtime, contents and interruption EAL before, after and avoided; present values "
                    "of the avoided losses (building, contents, interruption) and of the avoided casualties at the "
                    "user's value per avoided casualty (NaN when none is given: no built-in value), and the "
                    "benefit-cost ratio of the total (benefits_counted says what it counts).",
        units={"retrofit_cost": "{currency}", "casualties_before": "persons/yr", "casualties_after": "persons/yr",
               "avoided_casualties": "persons/yr", "downtime_days_before": "building-days/yr",
               "downtime_days_after": "building-days/yr", "avoided_downtime_days": "building-days/yr",
               "contents_eal_before": "{currency}/yr", "contents_eal_after": "{currency}/yr",
               "avoided_contents_eal": "{currency}/yr", "interruption_eal_before": "{currency}/yr",
               "interruption_eal_after": "{currency}/yr", "avoided_interruption_eal": "{currency}/yr",
               "pv_avoided_losses": "{currency}", "value_per_avoided_casualty": "{currency}/person",
               "pv_life_safety_benefit": "{currency}", "pv_total_benefit": "{currency}",
               "benefit_cost_ratio_all": "-"},
    ),
    "whatif_people_portfolio": dict(
        description="Retrofit what-if, portfolio casualties, downtime, contents and interruption losses before and "
                    "after each alternative: classical annual expectations, and in event-based runs the annual "
                    "averages over the same simulated years (standard error of the change from paired years).",
        units={"value_before": "see column unit", "value_after": "see column unit", "change": "see column unit",
               "relative_change": "-", "standard_error_of_change": "see column unit"},
    ),
})
TABLES["whatif_benefit_cost"]["description"] += (" benefits_counted: this ratio counts building repair cost only "
                                                 "(whatif_people adds contents, interruption and life safety).")

def units_for(name, currency, columns=None):
    """Column units of a run table, with ``{currency}`` replaced by the run's currency.

    A unit key ending in ``*`` stands for every column whose name starts with the rest
    (the per-ratio columns of ``asset_loss_curve``); given the table's ``columns``, it is
    expanded to them.

    Parameters
    ----------
    name : str
        A table name of :data:`TABLES`.
    currency : str
        Currency code of the run (e.g. ``"EUR"``).
    columns : list of str, optional
        The table's columns (expands the ``*`` keys).

    Returns
    -------
    dict of str -> str
        Column name -> unit.
    """
    units = {}
    if columns is not None:  # positions appended to per-asset and per-site tables (io.coordinates)
        units.update({c: "deg" for c in ("lon", "lat") if c in columns})
    for key, unit in TABLES[name]["units"].items():
        unit = unit.replace("{currency}", currency)
        if key.endswith("*") and columns is not None:
            units.update({c: unit for c in columns if c.startswith(key[:-1])})
        else:
            units[key] = unit
    return units
