"""Scenario earthquakes: many realisations of one or more given ruptures, their damage and losses.

Sequence (:func:`run_scenario`): the scenario's ruptures (:func:`scenario_ruptures`: from the
run's source model by source id or rupture index, or of their own geometry), ``n`` realisations
per rupture, each with a ground-motion model drawn by branch weight (as the event-based stage
draws one per event; ruptures of other tectonic regions take their region's models,
:func:`quakefolio.pipeline.stages.regions.event_region_models`); ln median, tau and phi at the
portfolio's hazard sites from the classical engine's pairs
(:func:`quakefolio.core.events.motion.event_ground_motion`); correlated residuals from the event
stage's field sampler (:class:`quakefolio.core.events.gmf.FieldSampler`, the run's ``[portfolio]``
correlation settings); optionally conditioned on station records
(:mod:`quakefolio.core.events.conditioning`, Worden et al. 2018); losses per asset and realisation
with the event stage's arithmetic (:func:`quakefolio.core.events.scenario.asset_realisation_losses`);
statistics over realisations (:mod:`quakefolio.core.events.scenario`). This module gathers inputs,
calls those and lays results out as tables (:mod:`quakefolio.pipeline.stages.scenario_tables`).
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.core.consequences import expected_consequence_given_im, mean_present_fraction
from quakefolio.core.errors import InputError, InputWarning, did_you_mean, locate_toml_line
from quakefolio.core.events.conditioning import condition_field, sample_conditioned
from quakefolio.core.events.eventset import (
    EVENT_BLOCK_SIZE, STREAM_GMM_CHOICE, conditioned_rng, event_blocks, stream_rng,
)
from quakefolio.core.events.gmf import FieldSampler
from quakefolio.core.events.scenario import asset_realisation_losses
from quakefolio.core.events.motion import event_ground_motion, event_ln_im
from quakefolio.core.hazard import rupture_ground_motion
from quakefolio.core.sources.geometry import aeqd_forward, mean_position
from quakefolio.core.sources.mfd import MagnitudeBins
from quakefolio.core.sources.ruptures import RuptureSet, point_source_ruptures, rupture_corners
from quakefolio.core.vulnerability import VulnerabilityTable
from quakefolio.pipeline.stages import people as pp
from quakefolio.pipeline.stages.regions import event_region_models
from quakefolio.pipeline.stages.scenario_tables import scenario_tables

__all__ = ["ScenarioProduct", "scenario_ruptures", "run_scenario", "PORTFOLIO_PERCENTILES"]

#: Percentiles [%] of the portfolio loss over realisations (with the mean).
PORTFOLIO_PERCENTILES = (50.0, 90.0, 99.0)
#: Largest magnitude difference [Mw] accepted between a requested and a source-model magnitude.
_MAG_TOLERANCE = 0.051


@dataclass(frozen=True)
class ScenarioProduct:
    """Tables of a scenario run and the located warnings met on the way."""

    tables: dict
    warnings: tuple
    n_realisations: int
    conditioned: bool


def _source_rupture(rs, r, i, spec):
    """Index in ``rs`` of the rupture a ``source_id`` entry names (the middle floating position)."""
    column = f"ruptures[{i}].source_id"
    if r.source_id not in rs.source_ids:
        hint = did_you_mean(r.source_id, rs.source_ids, cutoff=0.6)
        raise InputError(spec.path, f"source {r.source_id!r} is not in the run's source model{hint}", row=r.row,
                         column=column)
    sel = np.flatnonzero(rs.source_index == rs.source_ids.index(r.source_id))
    mags = rs.mag[sel]
    target = float(mags.max()) if r.magnitude is None else r.magnitude
    best = float(mags[np.argmin(np.abs(mags - target))])
    if abs(best - target) > _MAG_TOLERANCE:
        raise InputError(spec.path, f"source {r.source_id!r} has no rupture of magnitude {target:g} (its ruptures "
                                    f"span {mags.min():g}-{mags.max():g} Mw)", row=r.row,
                         column=f"ruptures[{i}].magnitude")
    cand = sel[mags == best]
    return int(cand[len(cand) // 2])


def scenario_ruptures(inputs, spec):
    """The scenario's ruptures as one rupture set, in the order of the file.

    Parameters
    ----------
    inputs : RunInputs
        Compute-mode inputs (the source model of ``source_branch``, or the first branch).
    spec : ScenarioSpec
        The scenario file (:func:`quakefolio.pipeline.io.scenario_file.read_scenario`).

    Returns
    -------
    RuptureSet
        One rupture per ``[[ruptures]]`` entry; a rupture of its own has source id = its id.

    Raises
    ------
    InputError
        Unknown source branch or source id, or a magnitude the source does not have.
    """
    model = inputs.hazard_model
    ids = [b for b, _, _ in model.source_branches]
    branch = spec.source_branch or ids[0]
    if branch not in ids:
        raise InputError(spec.path, f"unknown source branch {branch!r}; the logic tree has {ids}",
                         column="source_branch")
    rs = model.source_branches[ids.index(branch)][2].ruptures
    parts = []
    for i, r in enumerate(spec.ruptures):
        if r.rupture_index is not None:
            if r.rupture_index >= len(rs.mag):
                raise InputError(spec.path, f"rupture_index {r.rupture_index} is beyond the {len(rs.mag)} ruptures of "
                                            f"source branch {branch!r}", row=r.row,
                                 column=f"ruptures[{i}].rupture_index")
            parts.append(rs.subset([r.rupture_index]))
            continue
        if r.source_id is not None:
            parts.append(rs.subset([_source_rupture(rs, r, i, spec)]))
            continue
        lon, lat, depth = r.hypocentre
        if r.length_km is not None:
            parts.append(_given_plane(r))
            continue
        try:
            parts.append(point_source_ruptures(
                r.id, lon, lat, mfd=MagnitudeBins(np.array([r.magnitude]), np.array([1.0])),
                hypo_depths=[(depth, 1.0)], mechanisms=[(r.strike_deg, r.dip_deg, r.rake_deg, 1.0)],
                upper_depth_km=r.upper_depth_km, lower_depth_km=r.lower_depth_km))
        except ValueError as exc:
            raise InputError(spec.path, str(exc), row=r.row, column=f"ruptures[{i}]") from None
    return RuptureSet.concat(parts)


def _given_plane(r):
    """A rupture of given length and width [km] centred on its hypocentre (one rectangle)."""
    corners = rupture_corners(r.hypocentre[0], r.hypocentre[1], r.hypocentre[2], r.strike_deg, r.dip_deg,
                              r.length_km, r.width_km)
    return RuptureSet(source_index=np.zeros(1, dtype=np.int64), source_ids=(r.id,), mag=[r.magnitude], rate=[1.0],
                      strike_deg=[r.strike_deg], dip_deg=[r.dip_deg], rake_deg=[r.rake_deg],
                      ztor_km=corners[:, 0, 2], zbot_km=corners[:, 2, 2], width_km=[r.width_km],
                      length_km=[r.length_km], zhyp_km=[r.hypocentre[2]], corners=corners)


def _classes(inputs, local):
    """Class entries as the event stage builds them: (code, assets, im index, set, unique sites, pair)."""
    codes = inputs.exposure.building_class.to_numpy()
    out = []
    for code in sorted(set(codes)):
        dss = inputs.library[code]
        assets = np.flatnonzero(codes == code)
        usites, pair = np.unique(local[assets], return_inverse=True)
        out.append((code, assets, inputs.hazard_model.ims.index(dss.im), dss, usites, pair))
    return out


def _loss_entries(classes):
    return [(assets, i_im, dss.medians, dss.betas, dss.mean_damage_ratio, dss.cov, usites, pair)
            if dss.has_damage_states else
            (assets, i_im, VulnerabilityTable(dss.levels, dss.mean_loss_ratio, dss.cov), None, None, None, usites,
             pair) for _, assets, i_im, dss, usites, pair in classes]


class _Sites:
    """The portfolio's hazard sites (those assets map to) and their local coordinates."""

    def __init__(self, inputs):
        used = np.unique(inputs.site_index)
        self.local = np.searchsorted(used, inputs.site_index)
        self.ids = np.asarray(inputs.hazard.site_id)[used]
        self.lon, self.lat = inputs.hazard.lon[used], inputs.hazard.lat[used]
        self.vs30 = inputs.hazard_model.site_vs30[used]
        self.fields = {n: np.asarray(v)[used] for n, v in inputs.hazard_model.site_fields.items()}

    def at(self, lon, lat):
        """Site fields (z1p0_km, z2p5_km, backarc) at points: those of a site at the same position, else
        none (NaN depths: each model's own Vs30 relation; backarc 0)."""
        out = {n: np.where(n == "backarc", 0.0, np.nan) * np.ones(len(lon)) for n in self.fields}
        for i, (x, y) in enumerate(zip(lon, lat)):
            same = np.flatnonzero((self.lon == x) & (self.lat == y))
            for n in self.fields:
                if same.size:
                    out[n][i] = self.fields[n][same[0]]
        return out


def _local_xy(lon0, lat0, lon1, lat1):
    """Local coordinates [km] of two point sets in one azimuthal equidistant projection (one reference)."""
    ref = mean_position(np.concatenate([lon0, lon1]), np.concatenate([lat0, lat1]))
    x0, y0 = (np.asarray(a, dtype=float) for a in aeqd_forward(lon0, lat0, *ref))
    x1, y1 = (np.asarray(a, dtype=float) for a in aeqd_forward(lon1, lat1, *ref))
    return (x0, y0), (x1, y1)


def _km(a, b):
    """Distances [km] between the points ``a`` = (x, y) and ``b`` (same projection)."""
    return np.hypot(a[0][:, None] - b[0][None, :], a[1][:, None] - b[1][None, :])


def _rho(dist, range_km, spatial):
    """Within-event correlation exp(-3 h / b) (Jayaram & Baker 2009), or 1 only at zero distance."""
    if not spatial:
        return (dist == 0).astype(float)
    return np.exp(dist * (-3.0 / range_km))


class _Conditioner:
    """Replaces the conditioned IMs' fields of each (rupture, model) by station-conditioned draws."""

    def __init__(self, inputs, spec, sites, sampler, rs, models):
        self.st, self.spec, self.sites, self.sampler, self.rs = spec.stations, spec, sites, sampler, rs
        self.gmms, self.gmm_ids = models
        self.model = inputs.hazard_model
        self.default_vs30 = inputs.config.hazard.default_vs30_mps
        self.spatial = inputs.config.portfolio.spatial_correlation
        self.rows, self.warnings = [], []
        st = self.st
        self.vs30 = np.where(np.isnan(st.vs30_mps), self.default_vs30, st.vs30_mps)
        ims = list(self.model.ims)
        for name in sorted(set(st.im) - set(ims)):
            first = int(np.flatnonzero(st.im == name)[0])
            self.warnings.append(InputWarning(st.path, f"{name} is not an IM of the run ([hazard] ims {ims}); its "
                                                       f"{int(np.sum(st.im == name))} records are not used",
                                              row=int(st.rows[first]), column="im"))
        self.ims = [k for k, im in enumerate(ims) if np.any(st.im == im)]

    def apply(self, ln, mu, tau, phi, ev_rup, ev_gmm):
        """Overwrite ``ln`` [ln g] of the conditioned IMs, combination by combination (in place)."""
        gmms = self.gmms
        fields = self.sites.at(self.st.lon, self.st.lat)
        for k in self.ims:
            im = self.model.ims[k]
            sel = np.flatnonzero(self.st.im == im)
            t, s = _local_xy(self.sites.lon, self.sites.lat, self.st.lon[sel], self.st.lat[sel])
            d_ts, d_ss, d_tt = _km(t, s), _km(s, s), _km(t, t)  # one projection: a site on a station is at 0 km
            b = float(self.sampler.range_km[k])
            for j in np.unique(ev_rup):
                m_s, t_s, p_s = rupture_ground_motion(
                    self.st.lon[sel], self.st.lat[sel], self.vs30[sel], self.rs.subset([j]), gmms, [im],
                    max_distance_km=self.model.max_distance_km, region=self.model.region, ref=self.model.ref,
                    evaluate=np.unique(ev_gmm[ev_rup == j]), site_fields={n: v[sel] for n, v in fields.items()})
                for g in np.unique(ev_gmm[ev_rup == j]):
                    idx = np.flatnonzero((ev_rup == j) & (ev_gmm == g))
                    self._combination(ln, mu, tau, phi, idx, int(j), int(g), k, sel,
                                      (m_s[g, 0, :, 0], t_s[g, 0, :, 0], p_s[g, 0, :, 0]), (d_ts, d_ss, d_tt, b))

    def _combination(self, ln, mu, tau, phi, idx, j, g, k, sel, station_gm, geometry):
        m_s, t_s, p_s = station_gm
        d_ts, d_ss, d_tt, b = geometry
        use = np.isfinite(m_s)
        r = np.log(self.st.observed_g[sel]) - np.where(use, m_s, 0.0)
        u = np.flatnonzero(use)
        try:
            field = condition_field(r[u], t_s[u], p_s[u], self.st.sigma_ln[sel][u], _rho(d_ss[np.ix_(u, u)], b,
                                    self.spatial), _rho(d_ts[:, u], b, self.spatial), _rho(d_tt, b, self.spatial))
        except ValueError as exc:  # stations so close that their exact records leave no room for each other
            raise InputError(self.st.path, f"{exc} ({self.model.ims[k]}); give sigma_ln > 0 to stations a few metres "
                                           "apart", column="sigma_ln") from None
        eta, eps = sample_conditioned(field, conditioned_rng(self.spec.seed, j, g, k), idx.size)
        e0 = idx[0]
        ln[idx, k, :] = mu[e0, k] + tau[e0, k] * eta[:, None] + phi[e0, k] * eps  # -inf beyond the distance stays
        gmm_id = self.gmm_ids[g]
        for n, s in enumerate(sel):
            self.rows.append({"rupture_id": self.spec.ruptures[j].id, "gmm": gmm_id,
                              "station_id": str(self.st.station_id[s]), "lon": self.st.lon[s], "lat": self.st.lat[s],
                              "im": self.model.ims[k], "observed_g": self.st.observed_g[s],
                              "vs30_mps": self.vs30[s], "sigma_ln": self.st.sigma_ln[s],
                              "model_median_g": float(np.exp(m_s[n])) if use[n] else 0.0,
                              "total_residual_ln": float(r[n]) if use[n] else np.nan,
                              "between_event_mean": field.eta_mean, "between_event_sd": float(np.sqrt(field.eta_var)),
                              "used": bool(use[n])})
        if not use.all():
            far = ", ".join(str(self.st.station_id[s]) for s in sel[~use][:5])
            self.warnings.append(InputWarning(self.st.path, f"{int((~use).sum())} station(s) of {self.model.ims[k]} "
                                                            f"lie beyond the integration distance of rupture "
                                                            f"{self.spec.ruptures[j].id!r} and are not used ({far})",
                                              column="lon"))


def _ground_motion(inputs, spec, rs, sites):
    """ln IM [ln g] of every realisation (n_events, n_ims, n_sites), the events' rupture and model, stations."""
    model, pf = inputs.hazard_model, inputs.config.portfolio
    n, n_rup = spec.realisations, len(spec.ruptures)
    n_ev = n * n_rup
    ev_rup = np.repeat(np.arange(n_rup), n)
    weights = np.array([w for _, w, _ in model.gmm_branches])
    ev_gmm = stream_rng(spec.seed, STREAM_GMM_CHOICE).choice(len(weights), size=n_ev,
                                                               p=weights / weights.sum()).astype(np.int64)
    ev_gmm, gmms, gmm_ids = event_region_models(model, rs, ev_gmm, ev_rup, spec.seed)  # other regions' own models
    mu, tau, phi = event_ground_motion(sites.lon, sites.lat, sites.vs30, rs, ev_rup, ev_gmm, gmms, model.ims,
                                       max_distance_km=model.max_distance_km, region=model.region, ref=model.ref,
                                       site_fields=sites.fields)
    sampler = FieldSampler(sites.lon, sites.lat, model.ims, spatial_correlation=pf.spatial_correlation,
                           cross_im_correlation=pf.cross_im_correlation,
                           vs30_clustering=pf.correlation_range == "clustered_site_conditions")
    blocks = event_blocks(n_ev, EVENT_BLOCK_SIZE)
    res = sampler.sample_event_blocks(spec.seed, n_ev, np.arange(len(blocks)))
    ln = event_ln_im(mu, tau, phi, res.eta, res.eps, model.truncation_sigma)
    cond = None
    if spec.stations is not None:
        cond = _Conditioner(inputs, spec, sites, sampler, rs, (gmms, gmm_ids))
        cond.apply(ln, mu, tau, phi, ev_rup, ev_gmm)
    return ln, ev_rup, ev_gmm, gmm_ids, blocks, cond


def _casualties(inputs, classes, im):
    """Expected casualties [persons] per realisation and asset (NaN where occupants or rates are missing)."""
    ex = inputs.exposure
    occupants = ex["occupants"].to_numpy(dtype=float) if "occupants" in ex.columns else np.full(len(ex), np.nan)
    hours, present = pp.profile(inputs.config)
    share = 1.0 if hours is None else mean_present_fraction(hours, present)
    out = np.full((im.shape[0], len(ex)), np.nan)
    for _, assets, i_im, dss, usites, pair in classes:
        if not dss.has_damage_states or not np.all(np.isfinite(dss.casualty_rate)):
            continue
        given = expected_consequence_given_im(im[:, i_im, usites], dss.medians, dss.betas, dss.casualty_rate)
        out[:, assets] = given[:, pair] * occupants[assets] * share
    return out


def run_scenario(inputs, spec):
    """Damage, losses and casualties of the scenario's ruptures over their realisations.

    Parameters
    ----------
    inputs : RunInputs
        Compute-mode inputs of the run config (exposure, fragility library, hazard model).
    spec : ScenarioSpec
        The scenario file (:func:`quakefolio.pipeline.io.scenario_file.read_scenario`).

    Returns
    -------
    ScenarioProduct
        Tables ``scenario_ruptures``, ``scenario_asset_damage``, ``scenario_asset_loss``,
        ``scenario_portfolio_loss``, ``scenario_realisation_loss``, ``scenario_site_motion`` and,
        with stations, ``scenario_stations``.

    Raises
    ------
    InputError
        When the run config is not in compute mode, or a rupture cannot be found or built.
    """
    if inputs.hazard_model is None:
        path = inputs.config.path
        row = locate_toml_line(Path(path).read_text(encoding="utf-8-sig"), ("hazard",), "mode")
        raise InputError(path, "scenario earthquakes need [hazard] mode = \"compute\" (ground motion from the "
                               "ground-motion models)", row=row, column="hazard.mode")
    from quakefolio.pipeline.stages.events import single_blas_thread

    single_blas_thread()  # identical draws whatever the machine's thread count
    rs = scenario_ruptures(inputs, spec)
    sites = _Sites(inputs)
    ln, ev_rup, ev_gmm, gmm_ids, blocks, cond = _ground_motion(inputs, spec, rs, sites)
    im = np.exp(ln)
    classes = _classes(inputs, sites.local)
    pf, ex = inputs.config.portfolio, inputs.exposure
    group = np.unique(ex[pf.secondary_group].astype(str).to_numpy(dtype=object), return_inverse=True)[1].ravel()
    rows = [(b, int(lo), int(hi)) for b, (lo, hi) in enumerate(blocks)]
    gu, net = asset_realisation_losses(im, _loss_entries(classes), ex.replacement_value.to_numpy(),
                                       ex.deductible.to_numpy(dtype=float), ex.limit.to_numpy(dtype=float),
                                       loss_model=pf.loss_model, seed=spec.seed, blocks=rows,
                                       correlation=pf.secondary_correlation, group=group)
    cas = _casualties(inputs, classes, im)
    tables = scenario_tables(inputs, spec, rs, sites, classes, (ln, im, ev_rup, ev_gmm, gmm_ids), (gu, net, cas),
                            cond)
    warnings = tuple(dict.fromkeys(cond.warnings)) if cond is not None else ()  # once each, whatever the model
    return ScenarioProduct(tables, warnings, spec.realisations, cond is not None)
