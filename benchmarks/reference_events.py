"""A tight reference of the event-based stage's computation, in plain numpy (benchmark baseline).

What it computes, for a compute-mode run in whole-logic-tree mode with the mean-damage-ratio
loss model (the configuration of ``bench_portfolio.py``): the event set, each event's
ground motion at the portfolio's sites with spatially and cross-IM correlated residuals,
the mean loss ratio of every (site, class) pair, and per event the portfolio's ground-up
and net loss (per-building deductible and limit in closed form), per building the sums
and sums of squares of its losses over the events, the event-based exceedance counts of
the hazard levels, and the year losses with their AEP/OEP points.  That is everything the
stage's chunk tasks produce for that configuration, without the stage's generality
(sampled damage, group terms, people and time, per-branch mode, the eigen route of the
field sampler, input checks, progress, tasks and tables).

Shared with the stage, because they define the numbers rather than organise the work:
the random streams (:mod:`quakefolio.core.events.eventset`), the rupture geometry and
distances (:mod:`quakefolio.core.sources.geometry`), the ground-motion models
(:mod:`quakefolio.core.gmm`), the correlation models (Jayaram & Baker 2009 ranges, Baker &
Jayaram 2008 cross-IM matrix, :mod:`quakefolio.core.events.gmf`) and the closed-form net loss
ratio (:func:`quakefolio.core.loss.net_loss_ratio`).  Everything else is written out here:
distinct (model, rupture) pairs evaluated once per chunk of events in blocks of pairs, the
Cholesky factors, the residual draws and their mixing, the truncation transform, the
fragility, the loss sums per pair, exceedance counts, year losses.

It agrees with the stage to round-off (``tests/test_event_reference.py``: event losses
and per-building sums to 1e-12 relative, exceedance counts exactly).

It runs on one thread (BLAS limited to one thread, no threads of its own): a baseline of
the work, for the CPU-time ratio.  The stage may split a chunk over ``[execution]
max_workers`` threads; the benchmark names both thread counts in its rows.
"""
from __future__ import annotations

import numpy as np
import scipy.linalg as sla
from scipy.special import ndtr, ndtri
from threadpoolctl import threadpool_limits

from quakefolio.core.events.eventset import EVENT_BLOCK_SIZE, block_rng, branch_years, logic_tree_event_set
from quakefolio.core.events.gmf import cross_im_correlation_matrix, jb09_range_km
from quakefolio.core.gmm import GmmInput
from quakefolio.core.ims import model_period
from quakefolio.core.loss import net_loss_ratio
from quakefolio.core.sources.geometry import aeqd_forward, mean_position, pair_distances, site_rupture_mask
from quakefolio.core.sources.ruptures import RuptureSet

#: Pairs per ground-motion model call, as the stage (quakefolio.core.events.motion.EVENT_PAIR_BLOCK).
PAIRS = 32_768


def event_set(model, years, seed):
    """Whole-tree event set: (ruptures, events, model of each event)."""
    ws = [w for _, w, _ in model.source_branches]
    wg = [w for _, w, _ in model.gmm_branches]
    combos = [(s, g, ws[s] * wg[g]) for s in range(len(ws)) for g in range(len(wg))]
    weights = np.array([w for _, _, w in combos])
    year_combo = branch_years(weights / weights.sum(), years, seed)
    src_of, gmm_of = np.array([c[0] for c in combos]), np.array([c[1] for c in combos])
    sets = [src.ruptures for _, _, src in model.source_branches]
    events = logic_tree_event_set([rs.rate for rs in sets], src_of[year_combo], seed)
    return RuptureSet.concat(sets), events, gmm_of[year_combo[events.year - 1]]


def site_factors(lon, lat, ims, clustering):
    """Cholesky factor of the Jayaram & Baker (2009) correlation matrix of each IM, and of the cross-IM matrix."""
    x, y = aeqd_forward(lon, lat, *mean_position(lon, lat))
    d = np.hypot(x[:, None] - x[None, :], y[:, None] - y[None, :])
    ranges = jb09_range_km(np.array([model_period(im) for im in ims]), clustering)
    chol = {b: sla.cholesky(np.exp(d * (-3.0 / b)), lower=True, check_finite=False) for b in set(ranges.tolist())}
    return [chol[b] for b in ranges.tolist()], np.linalg.cholesky(cross_im_correlation_matrix(ims))


def mix(a, cross):
    """In place: component k <- sum_{l<=k} cross[k, l] component l (component = a[k])."""
    for k in reversed(range(cross.shape[0])):
        a[k] *= cross[k, k]
        for l in range(k):
            if cross[k, l] != 0.0:
                a[k] += cross[k, l] * a[l]


def residuals(seed, block, m, factors, cross):
    """Between-event (m, n_ims) and within-event (m, n_ims, n_sites) residuals of one block of m events."""
    rng = block_rng(seed, block)
    n_ims, n = len(factors), factors[0].shape[0]
    eta = rng.standard_normal((m, n_ims))
    z = rng.standard_normal((n_ims, m, n))
    mix(eta.T, cross)
    mix(z, cross)
    return eta, np.stack([z[k] @ factors[k].T for k in range(n_ims)], axis=1)


def ground_motion(model, ruptures, sites, rup, gmm):
    """Median, tau and phi tables of the distinct (model, rupture) pairs of some events, and each event's row."""
    lon, lat, vs30 = sites
    keys, row = np.unique(gmm * len(ruptures) + rup, return_inverse=True)
    n_im = len(model.ims)
    mu = np.full((keys.size, n_im, lon.size), -np.inf)
    tau, phi = np.zeros(mu.shape), np.zeros(mu.shape)
    per = max(1, PAIRS // lon.size)
    for g, (_, _, gmm_model) in enumerate(model.gmm_branches):
        slots = np.flatnonzero(keys // len(ruptures) == g)
        for lo in range(0, slots.size, per):
            s = slots[lo:lo + per]
            sub = ruptures.subset(keys[s] % len(ruptures))
            si, ri = np.nonzero(site_rupture_mask(lon, lat, sub, model.max_distance_km, ref_lon=model.ref[0],
                                                  ref_lat=model.ref[1]))  # candidates (bounding circles)
            d = pair_distances(lon, lat, sub, si, ri, ref_lon=model.ref[0], ref_lat=model.ref[1])
            near = d["rjb_km"] <= model.max_distance_km  # the integration distance on Rjb
            si, ri, d = si[near], ri[near], {k: v[near] for k, v in d.items()}
            res = gmm_model.evaluate(GmmInput(
                mag=sub.mag[ri], vs30_mps=vs30[si], rrup_km=d["rrup_km"], rjb_km=d["rjb_km"], rx_km=d["rx_km"],
                ry0_km=d["ry0_km"], ztor_km=sub.ztor_km[ri], zhyp_km=sub.zhyp_km[ri], dip_deg=sub.dip_deg[ri],
                rake_deg=sub.rake_deg[ri], width_km=sub.width_km[ri], region=model.region), model.ims)
            for table, values in ((mu, res.ln_median), (tau, res.tau), (phi, res.phi)):
                table[s[ri], :, si] = values.T
    return mu, tau, phi, row.ravel()


def ln_im(mu, tau, phi, eta, eps, n):
    """ln IM with the total residual truncated at +-n sigma (Gaussian copula); -inf where mu is -inf."""
    finite = np.isfinite(mu)
    total = tau * eta[:, :, None] + phi * eps
    sigma = np.sqrt(tau * tau + phi * phi)
    if n is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            e = np.where(sigma > 0, total / sigma, 0.0)
        pn = ndtr(-n)
        t = -ndtri(pn + (1.0 - 2.0 * pn) * ndtr(-np.abs(e)))
        total = sigma * np.copysign(np.minimum(t, n), e)
    return np.where(finite, np.where(finite, mu, 0.0) + total, -np.inf)


def class_table(inputs, local):
    """Per class: assets, IM index, medians, betas, damage-ratio increments, mean, cov, sites, pair of each asset."""
    codes = inputs.exposure.building_class.to_numpy()
    out = []
    for code in sorted(set(codes)):
        dss = inputs.library[code]
        assets = np.flatnonzero(codes == code)
        usites, pair = np.unique(local[assets], return_inverse=True)
        mdr = np.asarray(dss.mean_damage_ratio, dtype=float)
        cov = np.nan_to_num(np.asarray(dss.cov, dtype=float)) if dss.cov is not None else np.zeros_like(mdr)
        out.append((assets, inputs.hazard_model.ims.index(dss.im), np.asarray(dss.medians), np.asarray(dss.betas),
                    np.diff(mdr, prepend=0.0), mdr, cov, usites, pair.ravel()))
    return out


def class_losses(x, cls, value, ded, lim, out, rows):
    """Mean-mode losses of one class for a block of events, added to ``out`` (gu, net, asset sums)."""
    assets, _, med, beta, inc, mdr, cov, _, pair = cls
    p = [ndtr(np.log(x / med[j]) / beta[j]) for j in range(med.size)]
    for j in range(med.size - 2, -1, -1):  # upper envelope over higher states
        p[j] = np.maximum(p[j], p[j + 1])
    ratio = sum(inc[j] * p[j] for j in range(med.size))
    v, d, lim_ = value[assets], ded[assets], lim[assets]
    terms = ~(((d == 0) | np.isnan(d)) & (np.isnan(lim_) | (lim_ == np.inf)))
    n_pairs = x.shape[1]
    gu_ev, net_ev, a_sum, a_sq = out
    gu_ev[rows] += ratio @ np.bincount(pair, weights=v, minlength=n_pairs)
    net_ev[rows] += ratio @ np.bincount(pair[~terms], weights=v[~terms], minlength=n_pairs)
    s1, s2 = ratio.sum(axis=0)[pair], (ratio * ratio).sum(axis=0)[pair]
    a_sum[0, assets] += v * s1
    a_sq[0, assets] += v * v * s2
    free = assets[~terms]
    a_sum[1, free] += v[~terms] * s1[~terms]
    a_sq[1, free] += v[~terms] ** 2 * s2[~terms]
    t = np.flatnonzero(terms)
    if t.size:
        inc_net = np.diff(net_loss_ratio(mdr, cov, v[t, None], d[t, None], lim_[t, None]), axis=-1, prepend=0.0)
        net = v[t] * sum(inc_net[:, j] * p[j][:, pair[t]] for j in range(med.size))
        net_ev[rows] += net.sum(axis=1)
        a_sum[1, assets[t]] += net.sum(axis=0)
        a_sq[1, assets[t]] += (net * net).sum(axis=0)


def reference_event_losses(inputs):
    """Everything the event stage's chunks produce for ``inputs`` (whole tree, mean-damage mode).

    Returns
    -------
    dict
        ``events`` (EventSet), ``ground_up``, ``net`` (n_events,) [currency]; ``asset_sum``,
        ``asset_sumsq`` (2, n_assets) over all events; ``exceed_counts`` (n_ims, n_sites, n_levels);
        ``aep``, ``oep`` at 100, 250, 475 and 2475 years (ground-up).
    """
    with threadpool_limits(limits=1, user_api="blas"):  # as the stage (bitwise the same on any executor)
        return _reference(inputs)


def _reference(inputs):
    model, pf = inputs.hazard_model, inputs.config.portfolio
    assert pf.loss_model == "mean_damage_ratio" and not pf.source_branch and pf.spatial_correlation
    ruptures, events, gmm_of_event = event_set(model, pf.years, pf.seed)
    used = np.unique(inputs.site_index)
    local = np.searchsorted(used, inputs.site_index)
    lon, lat = inputs.hazard.lon[used], inputs.hazard.lat[used]
    sites = (lon, lat, model.site_vs30[used])
    factors, cross = site_factors(lon, lat, model.ims, pf.correlation_range == "clustered_site_conditions")
    classes = class_table(inputs, local)
    ex = inputs.exposure
    value, ded, lim = (ex[c].to_numpy(dtype=float) for c in ("replacement_value", "deductible", "limit"))
    n_ev, n_assets = events.n_events, len(value)
    out = (np.zeros(n_ev), np.zeros(n_ev), np.zeros((2, n_assets)), np.zeros((2, n_assets)))
    ln_levels = np.log(model.levels_g)
    counts = np.zeros((len(model.ims), used.size, ln_levels.size), dtype=np.int64)
    chunk = EVENT_BLOCK_SIZE * max(1, int(np.ceil(inputs.config.execution.event_block_size / EVENT_BLOCK_SIZE)))
    for c0 in range(0, n_ev, chunk):
        c1 = min(n_ev, c0 + chunk)
        mu, tau, phi, row = ground_motion(model, ruptures, sites, events.rupture[c0:c1], gmm_of_event[c0:c1])
        for b0 in range(c0, c1, EVENT_BLOCK_SIZE):
            b1 = min(c1, b0 + EVENT_BLOCK_SIZE)
            r = row[b0 - c0:b1 - c0]
            eta, eps = residuals(pf.seed, b0 // EVENT_BLOCK_SIZE, b1 - b0, factors, cross)
            lnim = ln_im(mu[r], tau[r], phi[r], eta, eps, model.truncation_sigma)
            counts += (lnim[..., None] > ln_levels).sum(axis=0)
            im = np.exp(lnim)
            for cls in classes:
                class_losses(im[:, cls[1], cls[7]], cls, value, ded, lim, out, slice(b0, b1))
    gu = out[0]
    year = np.bincount(events.year - 1, weights=gu, minlength=pf.years)
    peak = np.zeros(pf.years)
    np.maximum.at(peak, events.year - 1, gu)
    rank = np.ceil(pf.years / np.array([100, 250, 475, 2475])).astype(int) - 1
    return {"events": events, "ground_up": gu, "net": out[1], "asset_sum": out[2], "asset_sumsq": out[3],
            "exceed_counts": counts, "aep": -np.sort(-year)[rank], "oep": -np.sort(-peak)[rank]}
