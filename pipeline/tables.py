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
        description="Per asset: expected annual loss (classical, exact under log-log hazard interpolation) "
                    "and annual collapse rate and probability in the horizon.",
        units={"site_distance_km": "km", "replacement_value": "{currency}", "eal": "{currency}/yr",
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
}


def units_for(name, currency):
    return {k: v.replace("{currency}", currency) for k, v in TABLES[name]["units"].items()}
