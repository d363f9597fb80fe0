r"""People and time: casualties, downtime, contents and business-interruption losses.

Damage states :math:`j = 1..n` are ordered; :math:`\lambda_j` [1/yr] is the annual rate of
reaching or exceeding state :math:`j` (:mod:`quakefolio.core.risk`), :math:`\lambda_{n+1} = 0`,
so the annual rate of being *in* state :math:`j` at the worst of an event is
:math:`\lambda_j - \lambda_{j+1}`.  Any consequence :math:`c_j` attached to state :math:`j`
(casualties per occupant present, downtime in days, contents damage ratio) has the
classical annual expectation

.. math:: E_1[C] = \sum_j (\lambda_j - \lambda_{j+1})\,c_j,

the same total-probability sum as the expected annual loss (Porter 2003, ICASP9;
:mod:`quakefolio.core.loss`).  Per building:

- expected annual casualties [persons/yr] :math:`= N_\text{occ}\,\bar f\,
  \sum_j (\lambda_j - \lambda_{j+1})\,r_j` with :math:`r_j` the casualty rate (fraction of
  occupants present) and :math:`\bar f` the time-averaged fraction of occupants present;
- expected annual downtime [building-days/yr] :math:`= \sum_j (\lambda_j - \lambda_{j+1})\,d_j`;
- expected annual contents loss [currency/yr] :math:`= V_c \sum_j (\lambda_j - \lambda_{j+1})\,\mu^c_j`;
- expected annual interruption loss [currency/yr] :math:`= B \times` expected annual downtime,
  :math:`B` the value of one day of interruption.

Time of day (our own input): the day is cut into periods :math:`p` of :math:`h_p` hours
(summing to 24) in which a fraction :math:`f_p` of the occupants is present.  Earthquakes
are taken to strike uniformly over the day, independently of the ground motion (an
assumption, common practice in casualty estimation), so the expected fraction present at
an event is the time average :math:`\bar f = \sum_p h_p f_p / 24`, and the classical
expectation with :math:`\bar f` is exact.  The event-based stage draws each event's period
with probability :math:`h_p / 24` (:func:`event_present_fraction`), which keeps the mean and
gives the spread of casualties between day and night.

Event-based figures are the expectation over damage states at each event's sampled
intensity, :math:`E[C \mid x] = \sum_j (P_j(x) - P_{j+1}(x))\,c_j` with the enveloped
fragility :math:`P_j` (:func:`quakefolio.core.events.portfolio.exceedance_envelope`), summed
over buildings: their annual average estimates the classical expectation of the same
model without bias, and their EP curves carry the ground-motion and time-of-day
variability (not the damage-state sampling).
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.events.portfolio import exceedance_envelope

__all__ = ["HOURS_PER_DAY", "QUANTITIES", "check_occupancy_profile", "mean_present_fraction", "state_occupancy_rates",
           "expected_annual_consequence", "expected_consequence_given_im", "event_present_fraction",
           "event_consequence_sums", "interruption_loss"]

HOURS_PER_DAY = 24.0
#: The event-based quantities, in the order of the last axis of :func:`event_consequence_sums`:
#: casualties [persons], downtime [building-days], contents loss [currency], interruption loss [currency].
QUANTITIES = ("casualties", "downtime_days", "contents_loss", "interruption_loss")


def check_occupancy_profile(hours, present):
    r"""Validate a time-of-day occupancy profile.

    Parameters
    ----------
    hours : array_like, shape (n_periods,) [h]
        Duration of each period of the day, positive, summing to 24 (to 1e-9).
    present : array_like, shape (n_periods,) [-]
        Fraction of the occupants present in each period, in [0, 1].

    Returns
    -------
    hours, present : ndarray of float

    Raises
    ------
    ValueError
        Naming the argument, the constraint and the value.
    """
    h = np.asarray(hours, dtype=float)
    f = np.asarray(present, dtype=float)
    if h.ndim != 1 or h.size == 0 or h.shape != f.shape:
        raise ValueError(f"hours and present must be 1-d of the same non-zero length, got {h.shape} and {f.shape}")
    if np.any(~np.isfinite(h)) or np.any(h <= 0):
        raise ValueError(f"hours must be positive, got {h.tolist()}")
    if abs(h.sum() - HOURS_PER_DAY) > 1e-9:
        raise ValueError(f"hours must sum to 24, got {h.sum():.6g}")
    if np.any(~np.isfinite(f)) or np.any((f < 0) | (f > 1)):
        raise ValueError(f"present must lie in [0, 1], got {f.tolist()}")
    return h, f


def mean_present_fraction(hours, present):
    r"""Time-averaged fraction of occupants present [-].

    Parameters
    ----------
    hours, present : array_like, shape (n_periods,)
        As :func:`check_occupancy_profile`.

    Returns
    -------
    float
        :math:`\bar f = \sum_p h_p f_p / 24`.

    Notes
    -----
    With event times uniform over the day and independent of the ground motion, the
    expected casualties of an event are :math:`\bar f` times those with every occupant
    present (linearity of expectation; module notes).
    """
    h, f = check_occupancy_profile(hours, present)
    return float(np.dot(h, f) / HOURS_PER_DAY)


def state_occupancy_rates(ds_rates):
    r"""Annual rate [1/yr] of being in each damage state at the worst of an event.

    Parameters
    ----------
    ds_rates : array_like, shape (..., n_ds) [1/yr]
        Rates of reaching or exceeding each ordered state (non-increasing, non-negative).

    Returns
    -------
    ndarray, shape (..., n_ds) [1/yr]
        :math:`\lambda_j - \lambda_{j+1}`, :math:`\lambda_{n+1} = 0` (negative round-off clipped to 0).
    """
    lam = np.asarray(ds_rates, dtype=float)
    if lam.ndim == 0:
        raise ValueError("ds_rates needs a trailing damage-state axis")
    if np.any(lam < 0) or np.any(~np.isfinite(lam)):
        raise ValueError("ds_rates must be non-negative and finite")
    nxt = np.concatenate([lam[..., 1:], np.zeros_like(lam[..., :1])], axis=-1)
    return np.maximum(lam - nxt, 0.0)


def _per_state(values, n_ds, name):
    c = np.asarray(values, dtype=float)
    if c.shape[-1:] != (n_ds,):
        raise ValueError(f"{name} needs {n_ds} values along its last axis, got shape {c.shape}")
    if np.any(c[np.isfinite(c)] < 0) or np.any(np.isinf(c)):
        raise ValueError(f"{name} must be non-negative (NaN: not given), got {c.tolist()}")
    return c


def expected_annual_consequence(ds_rates, per_state):
    r"""Classical expected annual consequence [unit/yr] per damage-state consequence [unit].

    Parameters
    ----------
    ds_rates : array_like, shape (..., n_ds) [1/yr]
        Rates of reaching or exceeding each ordered state.
    per_state : array_like, shape (..., n_ds) [unit]
        Consequence of each state (casualty rate [-], downtime [days], contents damage
        ratio [-]); NaN where not given makes the result NaN.

    Returns
    -------
    ndarray, shape (...) [unit/yr]
        :math:`\sum_j (\lambda_j - \lambda_{j+1})\,c_j` (module notes).
    """
    occ = state_occupancy_rates(ds_rates)
    c = _per_state(per_state, occ.shape[-1], "per_state")
    return np.sum(occ * c, axis=-1)


def expected_consequence_given_im(im, medians, betas, per_state):
    r"""Expected consequence [unit] at intensity ``im``, over the damage states.

    Parameters
    ----------
    im : array_like, shape S [IM units], non-negative
    medians, betas : array_like, shape (n_ds,)
        Ordered lognormal fragility.
    per_state : array_like, shape (n_ds,) or (n_ds, n_q) [unit]
        Consequence of each state; with a second axis, several consequences at once.

    Returns
    -------
    ndarray, shape S or S + (n_q,) [unit]
        :math:`\sum_j (P_j(x) - P_{j+1}(x))\,c_j`, :math:`P_{n+1} = 0`, with the enveloped
        fragility (:func:`quakefolio.core.events.portfolio.exceedance_envelope`).
    """
    p = exceedance_envelope(im, medians, betas)
    n_ds = p.shape[-1]
    c = np.asarray(per_state, dtype=float)
    if c.shape[:1] != (n_ds,) or c.ndim > 2:
        raise ValueError(f"per_state must have shape ({n_ds},) or ({n_ds}, n_q), got {c.shape}")
    p_in = p - np.concatenate([p[..., 1:], np.zeros_like(p[..., :1])], axis=-1)
    return p_in @ c


def event_present_fraction(rng, n_events, hours, present):
    r"""Fraction of occupants present [-] at each event, its period drawn by duration.

    Parameters
    ----------
    rng : numpy.random.Generator
        The occupancy stream (:data:`quakefolio.core.events.eventset.STREAM_OCCUPANCY`).
    n_events : int
    hours, present : array_like, shape (n_periods,)
        As :func:`check_occupancy_profile`; None for both: every occupant always present.

    Returns
    -------
    ndarray, shape (n_events,) [-]
        :math:`f_{p(e)}` with :math:`P(p(e) = p) = h_p / 24`; its expectation is
        :func:`mean_present_fraction`.  Without a profile, ones (no draw).
    """
    if hours is None:
        return np.ones(n_events)
    h, f = check_occupancy_profile(hours, present)
    return f[rng.choice(len(h), size=n_events, p=h / h.sum())]


def event_consequence_sums(im, medians, betas, per_state, weights):
    r"""Consequences of a class's buildings summed per event.

    Parameters
    ----------
    im : ndarray, shape (n_events, n_pairs) [IM units]
        Intensity at the class's unique (site, class) pairs.
    medians, betas : array_like, shape (n_ds,)
    per_state : array_like, shape (n_ds, n_q)
        Consequence of each state per unit of weight (e.g. casualty rate, downtime days,
        contents damage ratio, downtime days); finite.
    weights : array_like, shape (n_pairs, n_q)
        Sum over the pair's buildings of what each consequence scales with (occupants,
        number of buildings, contents value, value of a day of interruption).

    Returns
    -------
    ndarray, shape (n_events, n_q)
        :math:`\sum_p w_{pq}\,E[c_q \mid x_{ep}]` (:func:`expected_consequence_given_im`).
    """
    given = expected_consequence_given_im(im, medians, betas, per_state)  # (n_ev, n_pairs, n_q)
    return np.einsum("epq,pq->eq", given, np.asarray(weights, dtype=float))


def interruption_loss(downtime_days, value_per_day):
    r"""Business-interruption loss [currency] = downtime [days] x value of one day [currency/day].

    Parameters
    ----------
    downtime_days : array_like [days] (or [days/yr] for an annual expectation)
    value_per_day : array_like [currency/day], broadcast against ``downtime_days``

    Returns
    -------
    ndarray [currency] (or [currency/yr])

    Notes
    -----
    Linear in the downtime, so the expected interruption loss is the daily value times
    the expected downtime (common practice for a constant daily loss of income).
    """
    return np.asarray(downtime_days, dtype=float) * np.asarray(value_per_day, dtype=float)
