r"""Ground motion of sampled events: each model on the pairs of the events that drew it; ln IM of the fields.

The (site, rupture) pairs within the integration distance and their model inputs are
those of the classical engine (:func:`quakefolio.core.pairs.block_pairs`); each model is
evaluated once per distinct (model, rupture) of the events, on the pairs of those
ruptures only (with Vs30 clamped to its range, :func:`quakefolio.core.pairs.model_input`),
and its values are written to the events; the ruptures of each tectonic region take the
models their events drew from that region's branches.  The field of an event is
:math:`\ln IM = \mu + \tau\eta + \phi\varepsilon` (Jayaram & Baker 2009;
:func:`quakefolio.core.events.gmf.ln_im`).

References
----------
Jayaram, N., Baker, J.W. (2009). Correlation model for spatially distributed ground-motion
intensities. Earthquake Engineering & Structural Dynamics 38(15), 1687-1708.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.events.gmf import check_standard_deviations, residual_term
from quakefolio.core.events.losses import PASS_VALUES
from quakefolio.core.events.threads import serial_map
from quakefolio.core.pairs import block_pairs, check_event_model, model_input

__all__ = ["EVENT_PAIR_BLOCK", "event_ground_motion", "event_ln_im"]


#: Most (site, rupture) pairs per ground-motion model call of :func:`event_ground_motion`
#: (and per pass of distances): a model's temporaries of one call (a few dozen arrays of
#: this length) then stay near the processor caches.  Measured on the development machine
#: (2 MB of L2 per core; 1,024 events on 2,000 sites, two models): 1.9 s of CPU per chunk
#: with 32,768 pairs per pass, 2.4 s with 262,144, 2.2 s with 8,000.
EVENT_PAIR_BLOCK = 32_768
#: Events per block of the median's initial fill (-inf: no ground motion), spread over ``map_fn``.
_FILL_ROWS = 64


def _slot_events(keys_of_event):
    """Distinct keys, and for each the events holding it: (keys, order, first) with the events
    of key k at ``order[first[k]:first[k + 1]]`` (CSR layout)."""
    keys, slot = np.unique(keys_of_event, return_inverse=True)
    slot = slot.ravel()
    order = np.argsort(slot, kind="stable")
    first = np.concatenate([[0], np.cumsum(np.bincount(slot, minlength=keys.size))])
    return keys, order, first


def _scatter(out, values, events, sites):
    """``out[events[j], i, sites[j]] = values[i, j]`` for ``out`` C-contiguous (n_events, n_ims, n_sites)."""
    n_ims, n_sites = out.shape[1:]
    flat = out.reshape(-1)
    at = events * (n_ims * n_sites) + sites
    for i in range(n_ims):
        flat[at + i * n_sites] = values[i]


def _copy_rows(order, first, arrays, rows_per_pass=256):
    """Each event's rows copied from the first event of its slot (``order``, ``first`` of
    :func:`_slot_events`), a few rows at a time (bounded temporaries)."""
    lead = np.empty_like(order)
    lead[order] = np.repeat(order[first[:-1]], np.diff(first))
    later = np.flatnonzero(lead != np.arange(lead.size))
    for lo in range(0, later.size, rows_per_pass):
        rows = later[lo:lo + rows_per_pass]
        for out in arrays:
            out[rows] = out[lead[rows]]


def event_ground_motion(site_lon, site_lat, site_vs30, ruptures, event_rupture, event_gmm, gmms, ims, *,
                        max_distance_km=200.0, region="global", ref, site_fields=None, pair_block=EVENT_PAIR_BLOCK,
                        map_fn=None):
    r"""Ln median [ln g], tau and phi [ln units] of each event's ground motion at each site.

    Parameters
    ----------
    site_lon, site_lat, site_vs30 : ndarray, shape (n_sites,) [deg], [deg], [m/s]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
        Ruptures of any tectonic regions (``region_code``).
    event_rupture : ndarray of int, shape (n_events,)
        Rupture of each event (index into ``ruptures``).
    event_gmm : ndarray of int, shape (n_events,)
        Ground-motion model of each event (index into ``gmms``; a model of the tectonic
        region of the event's rupture).
    gmms : sequence of ground-motion models
    ims : sequence of str
    max_distance_km, region, ref
        As :func:`quakefolio.core.hazard.rupture_ground_motion`.
    site_fields : dict of str to ndarray, shape (n_sites,), or None
        Per-site ``z1p0_km``, ``z2p5_km`` [km] (NaN: the model's own Vs30 relation) and
        ``backarc`` (0 or 1), as :func:`quakefolio.core.hazard.compute_site_hazard`.
    pair_block : int
        About the most (site, rupture) pairs per pass (:data:`EVENT_PAIR_BLOCK`); the
        values do not depend on it.
    map_fn : callable, optional
        Ordered map running the groups of ruptures (:func:`quakefolio.core.events.threads.block_map`;
        default one thread); each group writes the rows of its own events, so the values do
        not depend on it.

    Returns
    -------
    ln_median, tau, phi : ndarray, shape (n_events, n_ims, n_sites)
        ``-inf`` median and zero tau, phi beyond the integration distance.

    Raises
    ------
    ValueError
        If a model drawn by an event gives only a total sigma (``has_tau_phi`` False), or
        is not made for the tectonic region of the event's rupture
        (:func:`quakefolio.core.pairs.check_event_model`).

    Notes
    -----
    The (site, rupture) pairs within the integration distance and their model inputs
    are those of the classical engine (:func:`quakefolio.core.pairs.block_pairs`, with
    the site fields), computed once per distinct rupture of the events, a group of
    ruptures of one tectonic region at a time (about ``pair_block`` pairs).
    Each model is evaluated only on the pairs of the ruptures of the events that drew it,
    once per distinct (model, rupture), with Vs30 clamped to its own range
    (:func:`quakefolio.core.pairs.model_input`); its values are written to the first event
    of that (model, rupture) and copied, a whole row at a time, to the others.
    Distances and models are elementwise, so every value is the one of any other
    grouping (and of :func:`quakefolio.core.hazard.rupture_ground_motion`).  The event field is then
    :math:`\ln IM = \mu + \tau\eta + \phi\varepsilon` (Jayaram & Baker 2009,
    :func:`quakefolio.core.events.gmf.ln_im`).
    """
    ev_rup = np.asarray(event_rupture, dtype=np.int64).ravel()
    g_ev = np.asarray(event_gmm, dtype=np.int64).ravel()
    ims = list(ims)
    shape = (ev_rup.size, len(ims), len(site_lon))
    mu, tau, phi = np.empty(shape), np.zeros(shape), np.zeros(shape)  # zeros: pages zeroed on first use
    (map_fn or serial_map)(lambda lo: mu[lo:lo + _FILL_ROWS].fill(-np.inf), range(0, shape[0], _FILL_ROWS))
    if ev_rup.size == 0:
        return mu, tau, phi
    keys, order, first = _slot_events(g_ev * len(ruptures) + ev_rup)  # distinct (model, rupture)
    slot_g, slot_r = np.divmod(keys, len(ruptures))
    _check_models(gmms, slot_g, ruptures.region_code[slot_r])
    uniq, slot_u = np.unique(slot_r, return_inverse=True)
    drawn = np.zeros((len(gmms), uniq.size), dtype=bool)
    drawn[slot_g, slot_u] = True
    code = ruptures.region_code[uniq]
    # one region per group of ruptures (the inputs of its models, as the classical engine's
    # parts); within it, ruptures drawn by the same models side by side: fuller calls
    by_models = np.lexsort(np.vstack([drawn, code[None]]))
    rank = np.empty_like(by_models)
    rank[by_models] = np.arange(by_models.size)
    fields = {k: np.asarray(v, dtype=float) for k, v in (site_fields or {}).items() if v is not None}
    per_group = max(1, int(pair_block) // max(1, len(site_lon)))
    ends = np.flatnonzero(np.diff(code[by_models])) + 1
    groups = [(lo, min(stop, lo + per_group)) for start, stop in zip(np.r_[0, ends], np.r_[ends, uniq.size])
              for lo in range(start, stop, per_group)]  # within the ruptures of each region

    def group(bounds):  # writes the rows of its own (model, rupture) slots only
        lo, hi = bounds
        si, ri, _, _, inp, _ = block_pairs(site_lon, site_lat, site_vs30, ruptures.subset(uniq[by_models[lo:hi]]),
                                           max_distance_km, ref, region, **fields)
        if inp is not None:
            _evaluate_group(gmms, ims, (mu, tau, phi), (slot_g, slot_u, rank, order, first), lo, hi, si, ri, inp)

    (map_fn or serial_map)(group, groups)
    _copy_rows(order, first, (mu, tau, phi))
    return mu, tau, phi


def _check_models(gmms, slot_g, slot_code):
    """:func:`quakefolio.core.pairs.check_event_model` once per distinct (model, tectonic region) drawn."""
    from quakefolio.core.gmm import TECTONIC_REGIONS

    for key in np.unique(slot_g * len(TECTONIC_REGIONS) + slot_code):
        g, c = divmod(int(key), len(TECTONIC_REGIONS))
        check_event_model(gmms[g], TECTONIC_REGIONS[c])


def _evaluate_group(gmms, ims, outs, slots, lo, hi, si, ri, inp):
    """Each model drawn for the ruptures of ranks ``lo:hi`` on the pairs ``(si, ri)`` of those
    ruptures (``ri`` indexes the group) that it is drawn for, written to the first event of
    each (model, rupture) (``slots``: :func:`_slot_events` and the ranks of the ruptures)."""
    slot_g, slot_u, rank, order, first = slots
    slots = np.flatnonzero((rank[slot_u] >= lo) & (rank[slot_u] < hi))
    for g in np.unique(slot_g[slots]):
        mine = slots[slot_g[slots] == g]
        slot_of = np.full(hi - lo, -1)
        slot_of[rank[slot_u[mine]] - lo] = mine  # the model's slot of each rupture of the group
        p = np.flatnonzero(slot_of[ri] >= 0)
        res = gmms[g].evaluate(model_input(inp if p.size == ri.size else inp.take(p), gmms[g]), ims)
        events, sites = order[first[slot_of[ri[p]]]], si[p]  # the first event of each pair's slot
        for out, values in zip(outs, (res.ln_median, res.tau, res.phi)):
            _scatter(out, values, events, sites)


def event_ln_im(ln_median, tau, phi, eta, eps, truncation_sigma=None, out=None):
    r"""ln IM [ln g] of sampled events; ``-inf`` (no ground motion) beyond the integration distance.

    Parameters
    ----------
    ln_median, tau, phi : ndarray, shape (n_events, n_ims, n_sites)
        From :func:`event_ground_motion` (``-inf`` median beyond the integration distance).
    eta : ndarray, shape (n_events, n_ims) [-]
    eps : ndarray, shape (n_events, n_ims, n_sites) [-]
        Standard-normal residuals (:class:`quakefolio.core.events.gmf.FieldSampler`).
    truncation_sigma : float or None
    out : ndarray, shape (n_events, n_ims, n_sites), optional
        Where to write the result; may be ``ln_median`` itself.

    Returns
    -------
    ndarray, shape (n_events, n_ims, n_sites) [ln g]
        :func:`quakefolio.core.events.gmf.ln_im` where the median is finite, ``-inf`` elsewhere.

    Notes
    -----
    The operations of :func:`~quakefolio.core.events.gmf.ln_im`
    (:func:`~quakefolio.core.events.gmf.residual_term`), a few events at a time
    (:data:`quakefolio.core.events.losses.PASS_VALUES` values per pass, so that the
    temporaries stay in cache; elementwise, so the values do not depend on it).
    """
    ln_median = np.asarray(ln_median, dtype=np.float64)
    tau, phi, eta, eps = (np.asarray(a, dtype=np.float64) for a in (tau, phi, eta, eps))
    if eta.ndim != 2 or eps.ndim != 3 or eps.shape[:2] != eta.shape:
        raise ValueError(
            "eta must have shape (n_events, n_ims) and eps (n_events, n_ims, n_sites) with the same first two "
            f"axes; got {eta.shape} and {eps.shape}"
        )
    check_standard_deviations(tau, phi)
    out = np.empty(ln_median.shape) if out is None else out
    step = max(1, PASS_VALUES // max(1, int(np.prod(ln_median.shape[1:]))))
    for lo in range(0, ln_median.shape[0], step):
        rows = slice(lo, lo + step)
        # the arithmetic of ln_im with the median 0 beyond the distance (tau = phi = 0 there: a residual of 0)
        part = residual_term(tau[rows], phi[rows], eta[rows], eps[rows], truncation_sigma)
        part += ln_median[rows]
        part[~np.isfinite(ln_median[rows])] = -np.inf
        out[rows] = part
    return out
