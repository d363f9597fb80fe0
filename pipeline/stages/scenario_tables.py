"""Layout of the scenario-earthquake tables, with each table's description and units.

Statistics over realisations come from :mod:`quakefolio.core.events.scenario` (mean, its standard
error s/sqrt(n), empirical percentiles, damage-state probabilities averaged over realisations).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.core.events.portfolio import exceedance_envelope
from quakefolio.core.events.scenario import mean_exceedance, realisation_percentiles, standard_error_of_mean

__all__ = ["SCENARIO_TABLES", "PORTFOLIO_PERCENTILES", "scenario_tables", "scenario_units"]

#: Percentiles [%] of the portfolio loss over realisations (with the mean).
PORTFOLIO_PERCENTILES = (50.0, 90.0, 99.0)

#: The rupture plane's corners in the order of the rupture set (the plane dips to the right of start -> end).
_CORNERS = ("top_start", "top_end", "bottom_end", "bottom_start")

SCENARIO_TABLES = {
    "scenario_ruptures": dict(
        description="One row per scenario rupture: its source (a source-model id, or the rupture's own id), "
                    "magnitude, geometry (corners of the plane, top edge first, and its centre, the mean of the "
                    "corners) and "
                    "the realisations run.",
        units={"magnitude": "Mw", "strike_deg": "deg", "dip_deg": "deg", "rake_deg": "deg", "ztor_km": "km",
               "zbot_km": "km", "length_km": "km", "width_km": "km", "centre_lon": "deg", "centre_lat": "deg",
               "realisations": "-", **{f"{c}_{a}": "deg" for c in _CORNERS for a in ("lon", "lat")}}),
    "scenario_asset_damage": dict(
        description="Per rupture, asset and damage state: probability of reaching or exceeding the state, the mean "
                    "over realisations of the lognormal fragility at each realisation's intensity, with its "
                    "standard error. Assets of a vulnerability-table class have no rows.",
        units={"prob_exceed": "-", "prob_exceed_standard_error": "-"}),
    "scenario_asset_loss": dict(
        description="Per rupture and asset: mean ground-up and net loss over realisations, ground-up percentiles "
                    "(loss_p<q>, empirical, linear interpolation), mean loss ratio and expected casualties "
                    "(occupants x mean share present x casualty rate per state; NaN without occupants or rates).",
        units={"lon": "deg", "lat": "deg", "replacement_value": "{currency}", "mean_ground_up_loss": "{currency}",
               "mean_net_loss": "{currency}", "mean_loss_ratio": "-", "expected_casualties": "persons",
               "loss_p*": "{currency}"}),
    "scenario_portfolio_loss": dict(
        description="Per rupture, for the portfolio and each building class: the distribution over realisations "
                    "of the summed ground-up loss, net loss and expected casualties (mean with its standard error, "
                    "median, 90th and 99th percentiles, largest).",
        units={"mean": "{unit}", "mean_standard_error": "{unit}", "p50": "{unit}", "p90": "{unit}", "p99": "{unit}",
               "max": "{unit}", "realisations": "-"}),
    "scenario_realisation_loss": dict(
        description="One row per realisation: its rupture, ground-motion model and portfolio totals.",
        units={"ground_up_loss": "{currency}", "net_loss": "{currency}", "casualties": "persons"}),
    "scenario_site_motion": dict(
        description="Per rupture, hazard site and IM: median and 16th/84th percentiles of the sampled intensity "
                    "over realisations (0 beyond the integration distance).",
        units={"lon": "deg", "lat": "deg", "vs30_mps": "m/s", "median_g": "g", "p16_g": "g", "p84_g": "g"}),
    "scenario_stations": dict(
        description="Per rupture, ground-motion model and station record: the record, the model's median at the "
                    "station, the total residual ln(observed / median) and the between-event residual estimated "
                    "from the stations (posterior mean and standard deviation in units of tau, Worden et al. 2018); "
                    "used is false beyond the integration distance.",
        units={"lon": "deg", "lat": "deg", "observed_g": "g", "vs30_mps": "m/s", "sigma_ln": "ln units",
               "model_median_g": "g", "total_residual_ln": "ln units", "between_event_mean": "-",
               "between_event_sd": "-"}),
}


def scenario_units(name, currency, columns):
    """Unit of each column of a scenario table.

    Parameters
    ----------
    name : str
        A key of :data:`SCENARIO_TABLES`.
    currency : str
        The run's currency.
    columns : sequence of str
        The table's columns.

    Returns
    -------
    dict of str -> str
    """
    units = SCENARIO_TABLES[name]["units"]
    out = {}
    for c in columns:
        u = units.get(c) or (units.get("loss_p*") if c.startswith("loss_p") else None)
        if u is not None:
            out[c] = u.replace("{currency}", currency).replace("{unit}", f"{currency} or persons (column metric)")
    return out


def _rupture_table(spec, rs):
    centre = rs.corners[:, :, :2].mean(axis=1)
    return pd.DataFrame({
        "rupture_id": [r.id for r in spec.ruptures],
        "source_id": np.array(rs.source_ids, dtype=object)[rs.source_index],
        "from_source_model": [r.source_id is not None or r.rupture_index is not None for r in spec.ruptures],
        "magnitude": rs.mag, "strike_deg": rs.strike_deg, "dip_deg": rs.dip_deg, "rake_deg": rs.rake_deg,
        "ztor_km": rs.ztor_km, "zbot_km": rs.zbot_km, "length_km": rs.length_km, "width_km": rs.width_km,
        "centre_lon": centre[:, 0], "centre_lat": centre[:, 1],
        **{f"{corner}_{axis}": rs.corners[:, c, a] for c, corner in enumerate(_CORNERS)
           for a, axis in enumerate(("lon", "lat"))},
        "realisations": np.full(len(spec.ruptures), spec.realisations, dtype=np.int64),
    })


def _damage_rows(rid, inputs, classes, im):
    ex = inputs.exposure
    parts = []
    for code, assets, i_im, dss, usites, pair in classes:
        if not dss.has_damage_states:
            continue
        x = im[:, i_im, usites]
        p = mean_exceedance(x, dss.medians, dss.betas)[pair]  # (n_assets, n_ds)
        se = standard_error_of_mean(exceedance_envelope(x, dss.medians, dss.betas))[pair]
        n_ds = len(dss.names)
        parts.append(pd.DataFrame({
            "rupture_id": rid, "asset_id": np.repeat(ex.asset_id.to_numpy()[assets], n_ds),
            "building_class": code, "damage_state": np.tile(np.array(dss.names, dtype=object), len(assets)),
            "prob_exceed": p.ravel(), "prob_exceed_standard_error": se.ravel()}))
    return parts


def _distribution_rows(rid, scope, key, metric, totals, n):
    q = realisation_percentiles(totals, PORTFOLIO_PERCENTILES)
    return {"rupture_id": rid, "scope": scope, "key": key, "metric": metric, "mean": float(np.mean(totals)),
            "mean_standard_error": float(standard_error_of_mean(totals)), "p50": q[0], "p90": q[1], "p99": q[2],
            "max": float(np.max(totals)), "realisations": n}


def _portfolio_rows(rid, classes, gu, net, cas):
    n = gu.shape[0]
    rows = []
    for metric, arr in (("ground_up_loss", gu), ("net_loss", net), ("casualties", cas)):
        counted = np.isfinite(arr[0]) if n else np.zeros(arr.shape[1], bool)
        if metric == "casualties" and not counted.any():
            continue
        rows.append(_distribution_rows(rid, "portfolio", "all", metric, np.nansum(arr, axis=1), n))
        for code, assets, *_ in classes:
            if metric == "casualties" and not counted[assets].any():
                continue
            rows.append(_distribution_rows(rid, "building_class", code, metric, np.nansum(arr[:, assets], axis=1), n))
    return rows


def _asset_rows(rid, inputs, spec, gu, net, cas):
    ex = inputs.exposure
    value = ex.replacement_value.to_numpy(dtype=float)
    q = realisation_percentiles(gu, spec.percentiles)
    frame = pd.DataFrame({
        "rupture_id": rid, "asset_id": ex.asset_id.to_numpy(), "building_class": ex.building_class.to_numpy(),
        "lon": ex.lon.to_numpy(dtype=float), "lat": ex.lat.to_numpy(dtype=float), "replacement_value": value,
        "mean_ground_up_loss": gu.mean(axis=0), "mean_net_loss": net.mean(axis=0),
        "mean_loss_ratio": gu.mean(axis=0) / value,
        **{f"loss_p{p:g}": q[i] for i, p in enumerate(spec.percentiles)},
        "expected_casualties": cas.mean(axis=0),
    })
    return frame


def _site_rows(rid, sites, ims, im):
    q = np.percentile(im, [50.0, 16.0, 84.0], axis=0)  # (3, n_ims, n_sites)
    n_im, n_s = im.shape[1], im.shape[2]
    return pd.DataFrame({
        "rupture_id": rid, "site_id": np.tile(sites.ids, n_im), "lon": np.tile(sites.lon, n_im),
        "lat": np.tile(sites.lat, n_im), "vs30_mps": np.tile(sites.vs30, n_im),
        "im": np.repeat(np.array(ims, dtype=object), n_s),
        "median_g": q[0].ravel(), "p16_g": q[1].ravel(), "p84_g": q[2].ravel()})


def scenario_tables(inputs, spec, rs, sites, classes, motion, losses, cond):
    """Every scenario table.

    Parameters
    ----------
    inputs : RunInputs
    spec : ScenarioSpec
    rs : RuptureSet
        The scenario's ruptures, in file order.
    sites : object
        The portfolio's hazard sites (``ids``, ``lon``, ``lat``, ``vs30``).
    classes : list of (code, assets, im index, DamageStateSet, unique sites, pair)
    motion : (ndarray, ndarray, ndarray, ndarray, list of str)
        ln IM [ln g] and IM [g] of every realisation (n_events, n_ims, n_sites), each event's rupture
        and ground-motion model index, and the models' ids.
    losses : (ndarray, ndarray, ndarray)
        Ground-up and net loss [currency] and expected casualties [persons], (n_events, n_assets).
    cond : object or None
        The station conditioner (its ``rows``), None without stations.

    Returns
    -------
    dict of str -> pandas.DataFrame
    """
    _, im, ev_rup, ev_gmm, gmm_ids = motion
    gu, net, cas = losses
    gmm_ids = np.array(gmm_ids, dtype=object)
    damage, assets, portfolio, site = [], [], [], []
    for j, r in enumerate(spec.ruptures):
        ev = np.flatnonzero(ev_rup == j)
        damage += _damage_rows(r.id, inputs, classes, im[ev])
        assets.append(_asset_rows(r.id, inputs, spec, gu[ev], net[ev], cas[ev]))
        portfolio += _portfolio_rows(r.id, classes, gu[ev], net[ev], cas[ev])
        site.append(_site_rows(r.id, sites, inputs.hazard_model.ims, im[ev]))
    counted = np.isfinite(cas[0]) if len(cas) else np.zeros(0, bool)
    tables = {
        "scenario_ruptures": _rupture_table(spec, rs),
        "scenario_asset_damage": pd.concat(damage, ignore_index=True) if damage else pd.DataFrame(),
        "scenario_asset_loss": pd.concat(assets, ignore_index=True),
        "scenario_portfolio_loss": pd.DataFrame(portfolio),
        "scenario_realisation_loss": pd.DataFrame({
            "rupture_id": np.array([r.id for r in spec.ruptures], dtype=object)[ev_rup],
            "realisation": np.tile(np.arange(spec.realisations, dtype=np.int64), len(spec.ruptures)),
            "gmm": gmm_ids[ev_gmm], "ground_up_loss": gu.sum(axis=1), "net_loss": net.sum(axis=1),
            "casualties": np.nansum(cas, axis=1) if counted.any() else np.nan}),
        "scenario_site_motion": pd.concat(site, ignore_index=True),
    }
    if cond is not None:
        tables["scenario_stations"] = pd.DataFrame(cond.rows)
    return tables
