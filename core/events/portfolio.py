r"""Loss and aggregation math of the event-based portfolio stage.

The event-based stage simulates ``N`` years of Poisson earthquake occurrences, samples
an intensity :math:`x` at every asset for every event, and turns it into a loss.  This
module holds the deterministic arithmetic of that chain, vectorised over assets and
events:

1. **Loss ratio given intensity.**  Ordered damage states :math:`j = 1..n` have lognormal
   fragility curves :math:`P_j(x) = \Phi(\ln(x/\theta_j)/\beta_j)` (the probability of
   reaching or exceeding state :math:`j`) and mean damage ratios :math:`\mu_j`
   (repair cost / replacement value, non-decreasing).  Either the mean loss ratio at
   the sampled intensity is used (:func:`expected_loss_ratio`, the default) or a damage
   state and a loss ratio are sampled (:func:`sample_loss_ratio`).
2. **Policy terms** per asset and event (:func:`apply_policy` on a sampled loss; in the
   mean mode the expected net loss over damage states and loss ratios,
   :func:`expected_net_loss_ratio`).
3. **Aggregation** of the event loss table into a year loss table: the annual sum
   (basis of the aggregate exceedance probability, AEP) and the annual maximum event
   loss (basis of the occurrence exceedance probability, OEP), :func:`year_loss`.
4. **Statistics of N simulated years**: average annual loss with its standard error,
   probable maximum loss (PML) at return periods, tail value at risk (TVaR), and the
   full empirical exceedance curve.
5. **Closed forms** for independent Poisson event types, used to check the simulation.

Crossing fragility curves
-------------------------
Two lognormal curves with different dispersions always cross somewhere.  Both loss
models therefore use the upper envelope
:math:`P^*_j(x) = \max_{l \ge j} P_l(x)` as the probability of reaching state
:math:`j` (equal to :math:`P_j` wherever the curves are ordered), the same convention
as ``damage_state_rates(..., envelope=True)`` in :mod:`quakefolio.core.risk`.  The
fragility library rejects crossings inside the hazard range unless the user opts
into the envelope, so the envelope only matters for intensities far in the tails.

Empirical estimators of N simulated years (one convention everywhere)
--------------------------------------------------------------------
Let :math:`L_{(1)} \ge L_{(2)} \ge \dots \ge L_{(N)}` be the year losses sorted in
descending order, and :math:`m = N/T` the expected number of years out of :math:`N`
that reach the :math:`T`-year loss.

* Exceedance curve (:func:`full_ep_curve`): the :math:`i`-th largest loss is paired
  with the empirical probability :math:`p_i = i/N` that a year's loss equals or
  exceeds it, and the return period :math:`T_i = N/i`.
* PML (:func:`ep_from_years`): :math:`\mathrm{PML}(T) = L_{(\lceil N/T \rceil)}`, the
  largest loss equalled or exceeded in at least :math:`N/T` of the :math:`N` years.
  This is the upper :math:`(1 - 1/T)`-quantile of the empirical distribution,
  :math:`\inf\{l : F_N(l) > 1 - 1/T\}`, and it reads the exceedance curve exactly at
  its tabulated points (:math:`\mathrm{PML}(T_i) = L_{(i)}`).  When :math:`N/T` is an
  integer it is the :math:`N/T`-th largest year loss.
* TVaR (:func:`tvar`): the expected shortfall of the empirical distribution at
  probability level :math:`1 - 1/T` (Acerbi & Tasche 2002), which includes a
  fractional weight for the boundary order statistic,

  .. math:: \mathrm{TVaR}(T) = \frac{1}{m}\Big[\sum_{i=1}^{\lfloor m \rfloor} L_{(i)}
            + (m - \lfloor m \rfloor)\, L_{(\lfloor m \rfloor + 1)}\Big],

  coherent for any sample (ties included) and never below :math:`\mathrm{PML}(T)`.
* Return periods longer than the simulated record (:math:`T > N`) give NaN: no
  extrapolation beyond the largest simulated year.  :math:`N/T` within a relative
  1e-9 of an integer is taken as that integer (floating-point guard).

References
----------
Acerbi, C., Tasche, D. (2002). On the coherence of expected shortfall. Journal of
Banking & Finance 26(7), 1487-1503.

Grossi, P., Kunreuther, H. (eds.) (2005). Catastrophe Modeling: A New Approach to
Managing Risk. Springer, Chapter 2 (exceedance probability curves).
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.loss import beta_parameters, check_damage_ratios, check_terms, net_loss_ratio
from quakefolio.core.risk import lognormal_fragility

__all__ = [
    "exceedance_envelope",
    "expected_loss_ratio",
    "expected_net_loss_ratio",
    "expected_loss_ratios",
    "sample_loss_ratio",
    "has_policy_terms",
    "apply_policy",
    "year_loss",
    "ep_from_years",
    "full_ep_curve",
    "aal_with_standard_error",
    "tvar",
    "oep_closed_form",
    "oep_closed_form_probabilistic",
]

_INTEGER_SNAP = 1e-9  # relative tolerance for taking N/T as an integer


def _bad(values, ok):
    """Up to three offending entries (``ok`` false or not finite), for error messages."""
    values = np.asarray(values)
    mask = ~np.asarray(ok) | ~np.isfinite(values.astype(float))
    return values[mask][:3].tolist()


# --------------------------------------------------------------------------- damage


def _check_im(im):
    x = np.asarray(im, dtype=float)
    bad = np.isnan(x) | (x < 0)
    if np.any(bad):
        raise ValueError(f"im must be non-negative and not NaN [g], got {x[bad][:3].tolist()}")
    return x


def _check_state_axis(medians, betas):
    theta = np.asarray(medians, dtype=float)
    b = np.asarray(betas, dtype=float)
    if theta.ndim == 0 or b.ndim == 0:
        raise ValueError("medians and betas need a trailing damage-state axis, got a scalar")
    try:
        np.broadcast_shapes(theta.shape, b.shape)
    except ValueError as exc:
        raise ValueError(f"medians {theta.shape} and betas {b.shape} do not broadcast") from exc
    return theta, b


def exceedance_envelope(im, medians, betas):
    r"""Probability [-] of reaching or exceeding each damage state at ``im``.

    Parameters
    ----------
    im : array_like, shape S [g or the fragility's IM units], non-negative
    medians : array_like, shape F + (n_ds,) [IM units]
        Fragility medians :math:`\theta_j` of the ordered damage states.
    betas : array_like, shape F + (n_ds,) [-]
        Lognormal standard deviations :math:`\beta_j > 0`.

    Returns
    -------
    ndarray, shape broadcast(S, F) + (n_ds,) [-]
        :math:`P^*_j(x) = \max_{l \ge j} \Phi(\ln(x/\theta_l)/\beta_l)`, non-increasing
        along the last axis.

    Notes
    -----
    Lognormal fragility (:func:`quakefolio.core.risk.lognormal_fragility`) with the
    upper envelope over higher states (module notes); identical to the plain curves
    wherever they are ordered.  Common practice for ordered damage states.
    """
    x = _check_im(im)
    theta, b = _check_state_axis(medians, betas)
    p = lognormal_fragility(x[..., None], theta, b)
    # np.maximum.accumulate(p[..., ::-1], axis=-1)[..., ::-1], one state at a time (an
    # accumulation along a short strided axis is several times slower); same values, same layout
    n = p.shape[-1]
    out = np.empty_like(p)
    out[..., 0] = p[..., n - 1]
    for k in range(1, n):
        np.maximum(out[..., k - 1], p[..., n - 1 - k], out=out[..., k])
    return out[..., ::-1]


def _state_terms(im, medians, betas, mean_damage_ratio, cov=None):
    p = exceedance_envelope(im, medians, betas)
    mdr, c = check_damage_ratios(mean_damage_ratio, cov)
    if mdr.shape[-1] != p.shape[-1]:
        raise ValueError(
            f"mean_damage_ratio has {mdr.shape[-1]} damage states but the fragility has {p.shape[-1]}"
        )
    try:
        shape = np.broadcast_shapes(p.shape, mdr.shape)
    except ValueError as exc:
        raise ValueError(f"mean_damage_ratio {mdr.shape} does not broadcast against {p.shape}") from exc
    return np.broadcast_to(p, shape), np.broadcast_to(mdr, shape), np.broadcast_to(c, shape)


def _state_draw(p, mdr, c, u):
    """Damage state per uniform ``u`` (inverse CDF over the ordered states, :func:`sample_loss_ratio`).

    Returns the state (0: none), the loss ratio where it is the state's mean (0 undamaged), the
    state's mean and CoV, and where the loss ratio is random (damaged with a CoV above 0).
    """
    state = np.sum(p > u[..., None], axis=-1)
    index = np.maximum(state - 1, 0)[..., None]
    mu = np.take_along_axis(mdr, index, axis=-1)[..., 0]
    cv = np.take_along_axis(c, index, axis=-1)[..., 0]
    damaged = state > 0
    return state, np.where(damaged, mu, 0.0), mu, cv, damaged & (cv > 0)


def expected_loss_ratio(im, medians, betas, mean_damage_ratio):
    r"""Mean loss ratio [-] at intensity ``im`` for an ordered damage-state set.

    Parameters
    ----------
    im : array_like, shape S [g or the fragility's IM units], non-negative
        Sampled intensity, e.g. ``(n_events, n_assets)``; ``np.inf`` is allowed.
    medians : array_like, shape F + (n_ds,) [IM units]
        Fragility medians, e.g. ``(n_assets, n_ds)`` or ``(n_ds,)``.
    betas : array_like, shape F + (n_ds,) [-]
        Lognormal dispersions.
    mean_damage_ratio : array_like, shape M + (n_ds,) [-]
        Mean repair cost / replacement value per state, in [0, 1], non-decreasing.

    Returns
    -------
    ndarray, shape broadcast(S, F, M) [-]
        In :math:`[0, \mu_n]`, non-decreasing in ``im``; 0 at ``im = 0`` and
        :math:`\mu_n` as ``im`` tends to infinity.

    Notes
    -----
    Total expectation over the damage state :math:`DS` at intensity :math:`x`:

    .. math:: E[LR \mid x] = \sum_{j=1}^{n} \big(P_j(x) - P_{j+1}(x)\big)\,\mu_j
              = \sum_{j=1}^{n} (\mu_j - \mu_{j-1})\,P_j(x),
              \quad P_{n+1} = 0,\ \mu_0 = 0,

    with :math:`P_j` the lognormal fragility (enveloped, module notes).  The second
    form (summation by parts) is evaluated: a sum of non-decreasing functions with
    non-negative weights, hence monotone in :math:`x`.  This is the default loss model
    of the event-based stage (mean damage ratio at the sampled intensity; standard
    damage-to-loss step of performance-based earthquake engineering, Porter 2003,
    ICASP9).
    """
    p, mdr, _ = _state_terms(im, medians, betas, mean_damage_ratio)
    increments = np.diff(mdr, axis=-1, prepend=0.0)
    return np.sum(increments * p, axis=-1)


def expected_net_loss_ratio(im, medians, betas, mean_damage_ratio, cov, value, deductible, limit, pair=None):
    r"""Expected net loss per unit of value [-] at intensity ``im``, after per-event policy terms.

    Parameters
    ----------
    im : array_like, shape S [IM units], non-negative
        Intensity at each asset, e.g. ``(n_events, n_assets)``.
    medians, betas : array_like, shape F + (n_ds,)
        Lognormal fragility parameters [IM units], [-].
    mean_damage_ratio, cov : array_like, shape M + (n_ds,) [-]
        Loss ratio given each state (cov 0, NaN or None: deterministic).
    value, deductible, limit : array_like, broadcastable to broadcast(S, F, M) [currency]
        Replacement value and per-event terms of each asset (NaN: none, as
        :func:`apply_policy`).
    pair : ndarray of int, shape (n_assets,), optional
        When given, ``im`` holds intensities at shared locations along its last axis and
        asset ``i`` takes column ``pair[i]`` (the fragility is evaluated once per
        location); the result's last axis is then the assets'.

    Returns
    -------
    ndarray, shape broadcast(S, F, M) [-]
        Times ``value``: :math:`E[\mathrm{net} \mid x]` [currency].  Without terms, bit
        for bit :func:`expected_loss_ratio`.

    Notes
    -----
    The same model as :func:`sample_loss_ratio` followed by :func:`apply_policy`, in
    expectation: total expectation over the damage state (enveloped fragility),

    .. math:: E[\mathrm{net} \mid x] = \sum_j \big(P^*_j(x) - P^*_{j+1}(x)\big)\,n_j
              = \sum_j (n_j - n_{j-1})\,P^*_j(x), \quad n_0 = 0,

    with :math:`n_j = E[\min(\max(V X_j - D, 0), L)]` in closed form
    (:func:`quakefolio.core.loss.net_loss_ratio`, incomplete-beta identity).  The terms are
    applied to the loss distribution, not to the mean loss ratio (the deductible payoff
    is convex, the limit concave: Jensen's inequality).
    """
    return expected_loss_ratios(im, medians, betas, mean_damage_ratio, cov, value, deductible, limit, pair)[1]


def expected_loss_ratios(im, medians, betas, mean_damage_ratio, cov, value, deductible, limit, pair=None):
    r"""Expected ground-up and net loss per unit of value [-], one fragility evaluation for both.

    Parameters and notes as :func:`expected_net_loss_ratio`.

    Returns
    -------
    ground_up : ndarray [-]
        Bit for bit :func:`expected_loss_ratio` (gathered by ``pair`` when given).
    net : ndarray [-]
        :func:`expected_net_loss_ratio`.
    """
    p = exceedance_envelope(im, medians, betas)
    mdr, c = check_damage_ratios(mean_damage_ratio, cov)
    if mdr.shape[-1] != p.shape[-1]:
        raise ValueError(
            f"mean_damage_ratio has {mdr.shape[-1]} damage states but the fragility has {p.shape[-1]}"
        )
    ground_up = np.sum(np.diff(mdr, axis=-1, prepend=0.0) * p, axis=-1)
    v, d, lim = (np.asarray(t, dtype=float) for t in (value, deductible, limit))
    r = net_loss_ratio(mdr, c, v[..., None], d[..., None], lim[..., None])  # per asset, not per asset-event
    increments = np.diff(r, axis=-1, prepend=0.0)
    net = 0.0
    for j in range(p.shape[-1]):  # state by state: no (events, assets, states) temporaries
        p_j = p[..., j] if pair is None else p[..., j][..., pair]
        net = net + increments[..., j] * p_j
    if pair is not None:
        ground_up = ground_up[..., pair]
    return ground_up, np.where(has_policy_terms(d, lim), net, ground_up)  # equal without terms; kept bit for bit


def sample_loss_ratio(rng, im, medians, betas, mean_damage_ratio, cov=None):
    r"""Sample a damage state and a loss ratio [-] for every asset-event.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of randomness (seeded by the caller for reproducibility).
    im : array_like, shape S [g or the fragility's IM units], non-negative
    medians, betas : array_like, shape F + (n_ds,)
        Lognormal fragility parameters [IM units], [-].
    mean_damage_ratio : array_like, shape M + (n_ds,) [-]
        Mean loss ratio :math:`\mu_j` given each state, in [0, 1], non-decreasing.
    cov : array_like, shape M + (n_ds,), or None [-]
        Coefficient of variation :math:`c_j` of the loss ratio given each state; 0,
        NaN or None means deterministic (equal to :math:`\mu_j`).

    Returns
    -------
    damage_state : ndarray of int, shape broadcast(S, F, M)
        0 for no damage, ``j`` (1-based) for damage state ``j``.
    loss_ratio : ndarray of float, shape broadcast(S, F, M) [-]
        0 where ``damage_state == 0``.

    Notes
    -----
    One uniform :math:`u \sim U(0, 1)` per asset-event; the state is the inverse CDF
    over the ordered states, :math:`DS = \#\{j : P^*_j(x) > u\}` (with ordered curves
    the number of states whose exceedance probability is above :math:`u`), so that
    :math:`P(DS = j) = P^*_j - P^*_{j+1}` and :math:`P(DS \ge j) = P^*_j`.  Given
    :math:`DS = j > 0` the loss ratio is :math:`\mathrm{Beta}(a_j, b_j)` with mean
    :math:`\mu_j` and CoV :math:`c_j` (method of moments,
    :func:`quakefolio.core.loss.beta_parameters`), or :math:`\mu_j` if :math:`c_j = 0`.
    The mean over many samples is :func:`expected_loss_ratio`.

    The generator is used in a fixed order: first all uniforms (shape of the result),
    then one beta variate per asset-event with a random loss ratio, in C order.
    """
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    p, mdr, c = _state_terms(im, medians, betas, mean_damage_ratio, cov)
    out_shape = p.shape[:-1]
    u = rng.random(out_shape)
    state, loss_ratio, mu, cv, random = _state_draw(p, mdr, c, u)
    if np.any(random):
        a, b = beta_parameters(mu[random], cv[random])
        loss_ratio[random] = rng.beta(a, b)
    return state, loss_ratio


# --------------------------------------------------------------------------- policy


def has_policy_terms(deductible, limit):
    r"""True where a deductible or a limit changes a loss [-]: deductible above 0 or limit below infinity.

    Parameters
    ----------
    deductible, limit : array_like [currency]
        Per-event terms of each asset (NaN: none, as :func:`apply_policy`).

    Returns
    -------
    ndarray of bool, broadcast shape
        False where the deductible is 0 or NaN and the limit NaN or ``inf``: there
        :func:`apply_policy` returns the ground-up loss itself, bit for bit
        (:math:`\min(\max(L - 0, 0), \infty) = L` for :math:`L \ge 0`).
    """
    d = np.asarray(deductible, dtype=float)
    lim = np.asarray(limit, dtype=float)
    return ~(((d == 0) | np.isnan(d)) & (np.isnan(lim) | (lim == np.inf)))


def apply_policy(ground_up, deductible, limit):
    r"""Net (insured) loss [currency] per asset-event after a deductible and a limit.

    Parameters
    ----------
    ground_up : array_like [currency], non-negative
        Ground-up loss, e.g. ``(n_events, n_assets)``.
    deductible : array_like, broadcastable [currency]
        Amount retained by the owner per event; NaN means none (0).
    limit : array_like, broadcastable [currency]
        Maximum payment per event; NaN means unlimited.

    Returns
    -------
    ndarray, broadcast shape [currency]

    Notes
    -----
    :math:`\mathrm{net} = \min(\max(L - D, 0), \mathrm{limit})`: the limit caps the
    payment *after* the deductible (the usual per-occurrence layer "limit xs
    deductible"; common practice), so the largest payment equals the limit, reached
    at a ground-up loss of :math:`D + \mathrm{limit}`.  Terms are absolute amounts and
    apply per event.
    """
    loss = np.asarray(ground_up, dtype=float)
    if np.any(~np.isfinite(loss)) or np.any(loss < 0):
        raise ValueError(f"ground_up must be non-negative and finite [currency], got {_bad(loss, loss >= 0)}")
    ded, lim = check_terms(deductible, limit)
    return np.minimum(np.maximum(loss - ded, 0.0), lim)


# --------------------------------------------------------------------------- aggregation


def year_loss(event_year, event_loss, n_years):
    r"""Aggregate and maximum event loss [currency] in each simulated year 1..N.

    Parameters
    ----------
    event_year : array_like of int, shape (n_events,)
        Year of each event, in ``1..n_years``.
    event_loss : array_like, shape (n_events,) [currency], non-negative
    n_years : int
        Number of simulated years :math:`N`.

    Returns
    -------
    aggregate : ndarray, shape (n_years,) [currency]
        :math:`A_y = \sum_{e \in y} L_e` (basis of the AEP curve); 0 in years without
        events.
    maximum : ndarray, shape (n_years,) [currency]
        :math:`M_y = \max_{e \in y} L_e` (basis of the OEP curve); 0 in years without
        events.

    Notes
    -----
    Sums by ``np.bincount`` with weights, maxima by ``np.maximum.at``.  Results of
    event chunks combine exactly: aggregates add, maxima take ``np.maximum``, so the
    event loss table can be streamed in chunks with memory bounded by ``n_years``.
    AEP/OEP from annual totals and annual maxima: Grossi & Kunreuther (2005), Ch. 2.
    """
    if isinstance(n_years, bool) or not isinstance(n_years, (int, np.integer)) or n_years < 1:
        raise ValueError(f"n_years must be a positive integer, got {n_years!r}")
    years = np.asarray(event_year)
    loss = np.asarray(event_loss, dtype=float)
    if years.ndim != 1 or loss.shape != years.shape:
        raise ValueError(
            f"event_year and event_loss must be 1-d arrays of equal length, got shapes {years.shape} and {loss.shape}"
        )
    if years.size and not np.issubdtype(years.dtype, np.integer):
        as_float = years.astype(float)
        if np.any(as_float != np.round(as_float)):
            raise ValueError(f"event_year must hold integers, got {_bad(as_float, as_float == np.round(as_float))}")
    years = years.astype(np.int64)
    if np.any((years < 1) | (years > n_years)):
        raise ValueError(f"event_year must lie in 1..{n_years}, got {_bad(years, (years >= 1) & (years <= n_years))}")
    if np.any(~np.isfinite(loss)) or np.any(loss < 0):
        raise ValueError(f"event_loss must be non-negative and finite [currency], got {_bad(loss, loss >= 0)}")
    index = years - 1
    aggregate = np.bincount(index, weights=loss, minlength=n_years).astype(float)
    maximum = np.zeros(n_years)
    np.maximum.at(maximum, index, loss)
    return aggregate, maximum


# --------------------------------------------------------------------------- statistics


def _check_year_losses(year_losses, min_years=1):
    y = np.asarray(year_losses, dtype=float)
    if y.ndim == 0:
        raise ValueError("year_losses needs a trailing year axis, got a scalar")
    if y.shape[-1] < min_years:
        raise ValueError(f"year_losses needs at least {min_years} simulated years, got {y.shape[-1]}")
    if np.any(~np.isfinite(y)):
        raise ValueError("year_losses must be finite")
    return y


def _expected_counts(n_years, return_periods_yr):
    t = np.asarray(return_periods_yr, dtype=float)
    if np.any(~np.isfinite(t)) or np.any(t < 1):
        raise ValueError(f"return_periods_yr must be finite and >= 1 [yr], got {_bad(t, t >= 1)}")
    m = n_years / t
    nearest = np.round(m)
    m = np.where(np.abs(m - nearest) <= _INTEGER_SNAP * m, nearest, m)
    return t, m


def ep_from_years(year_losses, return_periods_yr):
    r"""Loss [currency] with annual exceedance probability :math:`1/T` from N years.

    Parameters
    ----------
    year_losses : array_like, shape B + (N,) [currency]
        One value per simulated year: annual totals for AEP, annual maximum event
        losses for OEP.
    return_periods_yr : array_like, shape R [yr], each >= 1

    Returns
    -------
    ndarray, shape B + R [currency]
        :math:`\mathrm{PML}(T) = L_{(\lceil N/T \rceil)}`, NaN where :math:`T > N`.

    Notes
    -----
    :math:`L_{(r)}` is the :math:`r`-th largest year loss.  The estimator is the upper
    empirical quantile at probability level :math:`p = 1 - 1/T`,
    :math:`\inf\{l : F_N(l) > p\}` with :math:`F_N` the empirical distribution of
    the :math:`N` years: the largest loss equalled or exceeded in at least
    :math:`N/T` years.  Hence
    :math:`\#\{L > \mathrm{PML}\}/N < 1/T \le \#\{L \ge \mathrm{PML}\}/N`, and
    :math:`\mathrm{PML}(T_i) = L_{(i)}` at the return periods :math:`T_i = N/i` of
    :func:`full_ep_curve` (module notes).  The upper quantile
    :math:`q^{\alpha}(L) = \inf\{l : P[L \le l] > \alpha\}` of Acerbi & Tasche (2002),
    Section 2 (definition number from memory), applied to the empirical distribution
    with :math:`\alpha = 1 - 1/T`; any quantile at this level gives the same
    :func:`tvar`.
    """
    y = _check_year_losses(year_losses)
    n = y.shape[-1]
    t, m = _expected_counts(n, return_periods_yr)
    descending = -np.sort(-y, axis=-1)
    valid = m >= 1
    rank = np.where(valid, np.ceil(np.where(valid, m, 1.0)), 1).astype(np.int64)
    picked = np.take(descending, (rank - 1).ravel(), axis=-1).reshape(y.shape[:-1] + t.shape)
    return np.where(valid, picked, np.nan)


def full_ep_curve(year_losses):
    r"""Empirical exceedance curve of N simulated years, for plots and tables.

    Parameters
    ----------
    year_losses : array_like, shape B + (N,) [currency]
        Annual totals (AEP curve) or annual maximum event losses (OEP curve).

    Returns
    -------
    loss : ndarray, shape B + (N,) [currency]
        Year losses sorted in descending order, :math:`L_{(1)} \ge \dots \ge L_{(N)}`.
    annual_exceedance_prob : ndarray, shape (N,) [-]
        :math:`p_i = i/N`, the empirical probability that a year's loss equals or
        exceeds :math:`L_{(i)}`.
    return_period_yr : ndarray, shape (N,) [yr]
        :math:`T_i = N/i`.

    Notes
    -----
    Same convention as :func:`ep_from_years`, which returns :math:`L_{(i)}` at
    :math:`T = T_i` (module notes).  Empirical exceedance curve from simulated years;
    Grossi & Kunreuther (2005), Ch. 2.
    """
    y = _check_year_losses(year_losses)
    n = y.shape[-1]
    rank = np.arange(1, n + 1, dtype=float)
    return -np.sort(-y, axis=-1), rank / n, n / rank


def aal_with_standard_error(year_losses):
    r"""Average annual loss and its standard error [currency/yr].

    Parameters
    ----------
    year_losses : array_like, shape B + (N,) [currency], N >= 2
        Annual total losses of N independent simulated years.

    Returns
    -------
    aal : ndarray, shape B [currency/yr]
        Sample mean :math:`\bar L = \frac{1}{N}\sum_y L_y`.
    standard_error : ndarray, shape B [currency/yr]
        :math:`s/\sqrt{N}` with :math:`s` the sample standard deviation (``ddof=1``).

    Notes
    -----
    Simulated years are independent and identically distributed, so the standard
    error of the mean is :math:`s/\sqrt{N}` (central limit theorem; common practice).
    """
    y = _check_year_losses(year_losses, min_years=2)
    n = y.shape[-1]
    return y.mean(axis=-1), y.std(axis=-1, ddof=1) / np.sqrt(n)


def tvar(year_losses, return_periods_yr):
    r"""Tail value at risk (expected shortfall) [currency] at level :math:`1 - 1/T`.

    Parameters
    ----------
    year_losses : array_like, shape B + (N,) [currency]
        Annual totals (AEP basis) or annual maxima (OEP basis).
    return_periods_yr : array_like, shape R [yr], each >= 1

    Returns
    -------
    ndarray, shape B + R [currency]
        NaN where :math:`T > N`; otherwise :math:`\ge` :func:`ep_from_years` at the
        same :math:`T`.

    Notes
    -----
    Expected shortfall at tail probability :math:`\alpha = 1/T`, written for losses
    (Acerbi & Tasche 2002, Definition 2.6 / Proposition 3.2, equation numbering from
    memory):

    .. math:: \mathrm{ES}_\alpha = \frac{1}{\alpha}\Big(E\big[L\,\mathbf 1\{L > q\}\big]
              + q\,\big(\alpha - P[L > q]\big)\Big),

    with :math:`q` a :math:`(1-\alpha)`-quantile of :math:`L` (the value does not
    depend on which one).  For the empirical distribution of :math:`N` years with
    :math:`m = N/T` and :math:`k = \lfloor m \rfloor` this is

    .. math:: \mathrm{TVaR}(T) = \frac{1}{m}\Big[\sum_{i=1}^{k} L_{(i)}
              + (m - k)\,L_{(k+1)}\Big],

    the mean of the worst :math:`m` years where the boundary year counts with the
    fractional weight :math:`m - k`.  This keeps the estimator coherent (sub-additive
    over portfolios simulated on the same years) for every sample, ties included;
    the conditional mean of all years at or above the PML does not have that
    property.
    """
    y = _check_year_losses(year_losses)
    n = y.shape[-1]
    t, m = _expected_counts(n, return_periods_yr)
    descending = -np.sort(-y, axis=-1)
    top_sums = np.concatenate([np.zeros(y.shape[:-1] + (1,)), np.cumsum(descending, axis=-1)], axis=-1)
    valid = m >= 1
    m_safe = np.where(valid, m, 1.0)
    k = np.floor(m_safe).astype(np.int64)
    frac = m_safe - k
    boundary = np.take(descending, np.minimum(k, n - 1).ravel(), axis=-1).reshape(y.shape[:-1] + t.shape)
    boundary = np.where(k < n, boundary, 0.0)  # k == n only when T == 1, where frac == 0
    head = np.take(top_sums, k.ravel(), axis=-1).reshape(y.shape[:-1] + t.shape)
    out = (head + frac * boundary) / m_safe
    return np.where(valid, out, np.nan)


# --------------------------------------------------------------------------- closed forms


def _check_rates(rates):
    lam = np.asarray(rates, dtype=float)
    if lam.ndim != 1:
        raise ValueError(f"rates must be a 1-d array [1/yr], got shape {lam.shape}")
    if np.any(~np.isfinite(lam)) or np.any(lam < 0):
        raise ValueError(f"rates must be non-negative and finite [1/yr], got {_bad(lam, lam >= 0)}")
    return lam


def oep_closed_form(rates, losses, x):
    r"""Occurrence exceedance probability [-] of independent Poisson events, fixed losses.

    Parameters
    ----------
    rates : array_like, shape (n_types,) [1/yr]
        Annual rate :math:`\lambda_i` of each event type.
    losses : array_like, shape (n_types,) [currency]
        Deterministic loss :math:`L_i` of each event type.
    x : array_like, shape X [currency]
        Loss thresholds.

    Returns
    -------
    ndarray, shape X [-]
        :math:`P(\text{the largest event loss of a year} > x)`.

    Notes
    -----
    Events of type :math:`i` with :math:`L_i > x` occur as independent Poisson
    processes, so the number of events exceeding :math:`x` in a year is Poisson with
    mean :math:`\Lambda(x) = \sum_i \lambda_i \mathbf 1[L_i > x]` and

    .. math:: \mathrm{OEP}(x) = 1 - \exp\Big(-\sum_i \lambda_i\,\mathbf 1[L_i > x]\Big).

    This is the exceedance probability curve of an event loss table,
    :math:`1 - \prod_{i: L_i > x}(1 - p_i)` (Grossi & Kunreuther 2005, Ch. 2; form
    from memory), with the Poisson annual occurrence probability
    :math:`p_i = 1 - e^{-\lambda_i}`.  Evaluated by sorting the losses and a
    suffix sum of the rates (no ``n_types x n_thresholds`` array).
    """
    lam = _check_rates(rates)
    loss = np.asarray(losses, dtype=float)
    if loss.shape != lam.shape or np.any(~np.isfinite(loss)):
        raise ValueError(f"losses must be finite with the shape of rates {lam.shape}, got shape {loss.shape}")
    thresholds = np.asarray(x, dtype=float)
    if np.any(np.isnan(thresholds)):
        raise ValueError("x must not contain NaN")
    order = np.argsort(loss, kind="stable")
    sorted_loss = loss[order]
    suffix = np.concatenate([np.cumsum(lam[order][::-1])[::-1], [0.0]])
    n_not_above = np.searchsorted(sorted_loss, thresholds, side="right")
    return -np.expm1(-suffix[n_not_above])


def oep_closed_form_probabilistic(rates, prob_exceed):
    r"""Occurrence exceedance probability [-] of independent Poisson events, random losses.

    Parameters
    ----------
    rates : array_like, shape (n_types,) [1/yr]
        Annual rate :math:`\lambda_i` of each event type.
    prob_exceed : array_like, shape (n_types,) + X [-]
        :math:`P(L_i > x)` for each event type at each threshold, the loss of every
        occurrence drawn independently.

    Returns
    -------
    ndarray, shape X [-]

    Notes
    -----
    Thinning of a Poisson process: occurrences of type :math:`i` whose loss exceeds
    :math:`x` are Poisson with rate :math:`\lambda_i P(L_i > x)`, hence

    .. math:: \mathrm{OEP}(x) = 1 - \exp\Big(-\sum_i \lambda_i\,P(L_i > x)\Big),

    which reduces to :func:`oep_closed_form` for deterministic losses (event loss
    table exceedance curve, Grossi & Kunreuther 2005, Ch. 2).
    """
    lam = _check_rates(rates)
    p = np.asarray(prob_exceed, dtype=float)
    if p.ndim == 0 or p.shape[0] != lam.shape[0]:
        raise ValueError(
            f"prob_exceed must have a leading axis of length {lam.shape[0]} (one per rate), got shape {p.shape}"
        )
    if np.any(~np.isfinite(p)) or np.any((p < 0) | (p > 1)):
        raise ValueError("prob_exceed must lie in [0, 1]")
    return -np.expm1(-np.tensordot(lam, p, axes=(0, 0)))
