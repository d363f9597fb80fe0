r"""Damage to loss: expected annual loss and loss-exceedance curves.

Damage states :math:`j = 1..n` are ordered; :math:`\lambda_j` [1/yr] is the annual rate
of reaching or exceeding state :math:`j` (:mod:`quakefolio.core.risk`) and
:math:`\lambda_{n+1} = 0`.  The annual rate of being *in* state :math:`j` at the worst
of an event is :math:`\lambda_j - \lambda_{j+1}`.  Given state :math:`j` the loss ratio
:math:`LR_j` (repair cost / replacement value) has mean :math:`\mu_j` (the mean damage
ratio) and, optionally, a coefficient of variation :math:`c_j`, in which case it is
beta-distributed on [0, 1] with those moments; otherwise it is deterministic.

Expected annual loss (summation by parts, exact under the same hazard interpolation
as the damage-state rates):

.. math:: EAL = V \sum_j (\lambda_j - \lambda_{j+1})\,\mu_j
              = V \sum_j (\mu_j - \mu_{j-1})\,\lambda_j, \quad \mu_0 = 0.

Loss-exceedance rate of loss ratio :math:`l` (total probability over states):

.. math:: \nu(LR > l) = \sum_j (\lambda_j - \lambda_{j+1})\,P(LR_j > l),

whose integral over :math:`l \in [0, 1]` equals :math:`EAL/V`.  This is the standard
damage-to-loss convolution of performance-based earthquake engineering (common
practice; e.g. Porter 2003, "An overview of PEER's performance-based earthquake
engineering methodology", ICASP9).

Net loss after a deductible :math:`D` and a limit :math:`L` per event on the loss
:math:`VX` (:math:`V` replacement value, :math:`X` loss ratio) is the layer
:math:`\min(\max(VX - D, 0), L) = \min(VX, D + L) - \min(VX, D)`; its expectation is
therefore a difference of two limited expected values :math:`E[\min(X, u)]`, which for
a beta-distributed :math:`X` have a closed form through the regularised incomplete
beta function (:func:`limited_mean_loss_ratio`).  The expected net loss is taken over
the loss distribution, never by applying the terms to the mean loss.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.lazy import lazy_module

special = lazy_module("scipy.special")

__all__ = [
    "check_damage_ratios", "beta_parameters", "expected_annual_loss", "loss_exceedance_rates",
    "limited_mean_loss_ratio", "net_loss_ratio", "expected_annual_net_loss", "check_terms",
]


def check_damage_ratios(mean_damage_ratio, cov=None):
    """Validate mean damage ratios [-] (in [0, 1], non-decreasing) and their CoV [-].

    Returns float arrays ``(mdr, cov)`` with ``cov`` zero where not given.
    Raises ValueError naming the constraint and the value received.
    """
    mdr = np.asarray(mean_damage_ratio, dtype=float)
    if mdr.ndim == 0:
        raise ValueError("mean_damage_ratio needs a trailing damage-state axis")
    if np.any(~np.isfinite(mdr)) or np.any((mdr < 0) | (mdr > 1)):
        raise ValueError(f"mean_damage_ratio must lie in [0, 1], got {mdr[~((mdr >= 0) & (mdr <= 1))][:3].tolist()}")
    if np.any(np.diff(mdr, axis=-1) < 0):
        raise ValueError(f"mean_damage_ratio must be non-decreasing across damage states, got {mdr.tolist()}")
    c = np.zeros_like(mdr) if cov is None else np.broadcast_to(np.asarray(cov, dtype=float), mdr.shape).copy()
    c = np.nan_to_num(c, nan=0.0)
    if np.any(c < 0) or np.any(~np.isfinite(c)):
        raise ValueError(f"cov must be non-negative and finite, got {c.tolist()}")
    interior = (mdr > 0) & (mdr < 1) & (c > 0)
    var = (c * mdr) ** 2
    if np.any(interior & (var >= mdr * (1 - mdr))):
        raise ValueError(
            "cov too large for a beta distribution on [0, 1]: need cov**2 * mean < 1 - mean, "
            f"got mean {mdr[interior & (var >= mdr * (1 - mdr))][:3].tolist()} with cov "
            f"{c[interior & (var >= mdr * (1 - mdr))][:3].tolist()}"
        )
    if np.any(((mdr == 0) | (mdr == 1)) & (c > 0)):
        raise ValueError("a mean damage ratio of exactly 0 or 1 cannot have a positive cov")
    return mdr, c


def beta_parameters(mean, cov):
    r"""Shape parameters :math:`(a, b)` of the beta distribution with given mean and CoV.

    Method of moments: :math:`\sigma^2 = (c\mu)^2`,
    :math:`\nu = \mu(1-\mu)/\sigma^2 - 1`, :math:`a = \mu\nu`, :math:`b = (1-\mu)\nu`.
    """
    mu = np.asarray(mean, dtype=float)
    c = np.asarray(cov, dtype=float)
    var = (c * mu) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        nu = mu * (1 - mu) / var - 1.0
    return mu * nu, (1 - mu) * nu


def expected_annual_loss(ds_rates, mean_damage_ratio, value=1.0):
    r"""Expected annual loss [currency/yr] (or ratio/yr with ``value=1``).

    Parameters
    ----------
    ds_rates : array_like, shape (..., n_ds) [1/yr]
        Rates of reaching or exceeding each ordered damage state (non-increasing).
    mean_damage_ratio : array_like, shape (..., n_ds) [-]
        Mean repair cost / replacement value per state, non-decreasing in [0, 1].
    value : array_like, broadcastable to ``(...)`` [currency]
        Replacement value.

    Notes
    -----
    :math:`EAL = V \sum_j (\mu_j - \mu_{j-1})\lambda_j` with :math:`\mu_0 = 0` (module notes).
    """
    lam = np.asarray(ds_rates, dtype=float)
    mdr, _ = check_damage_ratios(mean_damage_ratio)
    if np.any(lam < 0) or np.any(~np.isfinite(lam)):
        raise ValueError("ds_rates must be non-negative and finite")
    inc = np.diff(mdr, axis=-1, prepend=0.0)
    return np.asarray(value, dtype=float) * np.sum(inc * lam, axis=-1)


def loss_exceedance_rates(ds_rates, mean_damage_ratio, loss_ratios, cov=None):
    r"""Annual rate [1/yr] at which the loss ratio exceeds each of ``loss_ratios``.

    Parameters
    ----------
    ds_rates : array_like, shape (..., n_ds) [1/yr]
    mean_damage_ratio : array_like, shape (..., n_ds) [-]
    loss_ratios : array_like, shape (n_l,) [-], in [0, 1]
    cov : array_like, shape (..., n_ds) or None [-]
        Coefficient of variation of the loss ratio given each state; 0 or None means
        a deterministic loss ratio equal to the mean.

    Returns
    -------
    ndarray, shape (..., n_l) [1/yr]

    Notes
    -----
    :math:`\nu(l) = \sum_j (\lambda_j - \lambda_{j+1}) P(LR_j > l)` with
    :math:`LR_j \sim \mathrm{Beta}(a_j, b_j)` from :func:`beta_parameters`, so
    :math:`P(LR_j > l) = 1 - I_l(a_j, b_j)` (regularised incomplete beta function).
    """
    lam = np.asarray(ds_rates, dtype=float)
    mdr, c = check_damage_ratios(mean_damage_ratio, cov)
    l = np.asarray(loss_ratios, dtype=float)
    if l.ndim != 1 or np.any((l < 0) | (l > 1)) or np.any(~np.isfinite(l)):
        raise ValueError(f"loss_ratios must be a 1-d array in [0, 1], got {l!r}")
    occ = lam - np.concatenate([lam[..., 1:], np.zeros_like(lam[..., :1])], axis=-1)
    occ = np.maximum(occ, 0.0)  # ordered rates; guards round-off only
    a, b = beta_parameters(mdr, c)
    random = (c > 0)[..., None]
    with np.errstate(divide="ignore", invalid="ignore"):
        p_beta = 1.0 - special.betainc(np.where(random, a[..., None], 1.0), np.where(random, b[..., None], 1.0), l)
    p_det = (mdr[..., None] > l).astype(float)
    p = np.where(random, p_beta, p_det)  # (..., n_ds, n_l)
    return np.einsum("...j,...jl->...l", occ, p)


# --------------------------------------------------------------------------- net of policy terms


def limited_mean_loss_ratio(mean, cov, cap):
    r"""Limited expected value :math:`E[\min(X, u)]` [-] of a loss ratio :math:`X` on [0, 1].

    Parameters
    ----------
    mean : array_like [-]
        Mean :math:`\mu` of :math:`X`, in [0, 1].
    cov : array_like [-]
        Coefficient of variation of :math:`X`; 0 or NaN means deterministic
        (:math:`X = \mu`), otherwise :math:`X \sim \mathrm{Beta}(a, b)` by
        :func:`beta_parameters`.
    cap : array_like [-]
        The cap :math:`u \ge 0`; ``np.inf`` is allowed (:math:`E[X] = \mu`).

    Returns
    -------
    ndarray, broadcast shape [-]
        In :math:`[0, \min(\mu, u)]`; 0 at :math:`u = 0` and exactly :math:`\mu` for
        :math:`u \ge 1`.

    Notes
    -----
    Incomplete-moment identity of the beta distribution: since
    :math:`x f(x; a, b) = \frac{a}{a+b} f(x; a+1, b)`,

    .. math:: E[\min(X, u)] = \int_0^u x f(x)\,dx + u\,P(X > u)
              = \mu\, I_u(a+1, b) + u\,\big(1 - I_u(a, b)\big),

    with :math:`I_u` the regularised incomplete beta function
    (``scipy.special.betainc``).  This is the limited expected value of the beta
    distribution listed in Klugman, Panjer & Willmot, *Loss Models: From Data to
    Decisions*, Appendix A (from memory), and Johnson, Kotz & Balakrishnan (1995),
    *Continuous Univariate Distributions* Vol. 2, Ch. 25 (incomplete moments; from
    memory).  Deterministic case: :math:`\min(\mu, u)`.
    """
    mu = np.asarray(mean, dtype=float)
    c = np.nan_to_num(np.asarray(cov, dtype=float), nan=0.0)
    u = np.asarray(cap, dtype=float)
    if np.any(~np.isfinite(mu)) or np.any((mu < 0) | (mu > 1)):
        raise ValueError(f"mean must lie in [0, 1], got {mu[~((mu >= 0) & (mu <= 1))][:3].tolist()}")
    if np.any(~np.isfinite(c)) or np.any(c < 0):
        raise ValueError(f"cov must be non-negative and finite, got {c[~((c >= 0) & np.isfinite(c))][:3].tolist()}")
    if np.any(np.isnan(u)) or np.any(u < 0):
        raise ValueError(f"cap must be non-negative, got {u[~(u >= 0)][:3].tolist()}")
    mu, c, u = np.broadcast_arrays(mu, c, u)
    out = np.array(np.minimum(mu, u), dtype=float)  # deterministic ratio, and every ratio at u = 0
    random = (c > 0) & (mu > 0) & (mu < 1) & (u > 0) & (u < 1)  # u >= 1: E[min(X, u)] = mu, as set above
    if np.any(random):
        a, b = beta_parameters(mu[random], c[random])
        uc = np.minimum(u[random], 1.0)
        out[random] = mu[random] * special.betainc(a + 1.0, b, uc) + uc * (1.0 - special.betainc(a, b, uc))
    return out


def check_terms(deductible, limit):
    """Per-event deductible (NaN -> 0) and limit (NaN -> inf) [currency] as float arrays, checked >= 0."""
    d = np.asarray(deductible, dtype=float)
    lim = np.asarray(limit, dtype=float)
    if np.any(d < 0):
        raise ValueError(f"deductible must be non-negative or NaN [currency], got {d[d < 0][:3].tolist()}")
    if np.any(lim < 0):
        raise ValueError(f"limit must be non-negative or NaN [currency], got {lim[lim < 0][:3].tolist()}")
    return np.where(np.isnan(d), 0.0, d), np.where(np.isnan(lim), np.inf, lim)


def _policy_terms(value, deductible, limit):
    """Replacement value, deductible (NaN -> 0) and limit (NaN -> inf) as float arrays, checked."""
    v = np.asarray(value, dtype=float)
    if np.any(~np.isfinite(v)) or np.any(v < 0):
        raise ValueError(f"value must be non-negative and finite [currency], got {v[~(v >= 0) | ~np.isfinite(v)][:3].tolist()}")
    return (v, *check_terms(deductible, limit))


def net_loss_ratio(mean, cov, value, deductible, limit):
    r"""Expected net loss per unit of value, :math:`E[\min(\max(VX - D, 0), L)] / V` [-].

    Parameters
    ----------
    mean, cov : array_like [-]
        Mean and CoV of the loss ratio :math:`X` (:func:`limited_mean_loss_ratio`).
    value : array_like [currency]
        Replacement value :math:`V \ge 0`.
    deductible : array_like [currency]
        Per-event deductible :math:`D`; NaN means none (0), as
        :func:`quakefolio.core.events.portfolio.apply_policy`.
    limit : array_like [currency]
        Per-event limit :math:`L` on the payment after the deductible; NaN means
        unlimited.

    Returns
    -------
    ndarray, broadcast shape [-]
        Multiply by :math:`V` for the expected net loss [currency]; 0 where :math:`V = 0`.
        With no terms (:math:`D = 0`, :math:`L = \infty`) exactly ``mean``; with
        :math:`L = 0` exactly 0.

    Notes
    -----
    The layer identity :math:`\min(\max(y - D, 0), L) = \min(y, D + L) - \min(y, D)`
    (for :math:`y, D, L \ge 0`) and linearity of expectation give

    .. math:: E[\mathrm{net}] = V\,\Big(E\big[\min(X, \tfrac{D + L}{V})\big]
              - E\big[\min(X, \tfrac{D}{V})\big]\Big),

    each term by :func:`limited_mean_loss_ratio`.  Non-decreasing in :math:`L`,
    non-increasing in :math:`D`.
    """
    v, d, lim = _policy_terms(value, deductible, limit)
    positive = v > 0
    safe_v = np.where(positive, v, 1.0)
    upper = np.where(positive, (d + lim) / safe_v, 0.0)  # L = 0: equal to the lower cap, hence exactly 0
    lower = np.where(positive, d / safe_v, 0.0)
    r = limited_mean_loss_ratio(mean, cov, upper) - limited_mean_loss_ratio(mean, cov, lower)
    return np.maximum(r, 0.0)  # guards round-off of the difference only


def expected_annual_net_loss(ds_rates, mean_damage_ratio, cov, value, deductible, limit):
    r"""Expected annual net loss [currency/yr] after a per-event deductible and limit.

    Parameters
    ----------
    ds_rates : array_like, shape (..., n_ds) [1/yr]
        Rates of reaching or exceeding each ordered damage state (non-increasing).
    mean_damage_ratio, cov : array_like, shape (..., n_ds) [-]
        Loss ratio given each state (:func:`check_damage_ratios`; cov 0 or NaN:
        deterministic).
    value, deductible, limit : array_like, broadcastable to ``(...)`` [currency]
        Replacement value and policy terms (:func:`net_loss_ratio`; NaN: none).

    Returns
    -------
    ndarray, shape (...) [currency/yr]
        Equal to :func:`expected_annual_loss` (bit for bit) without terms.

    Notes
    -----
    Total expectation over the damage state of an event, as for the EAL (module notes),
    with the expected net loss given the state :math:`n_j = V\,E[\mathrm{net}_j]/V`
    (:func:`net_loss_ratio`, :math:`n_0 = 0`):

    .. math:: EAL_{net} = \sum_j (\lambda_j - \lambda_{j+1})\,n_j
              = \sum_j (n_j - n_{j-1})\,\lambda_j .

    The terms apply per event, each event's loss drawn from its damage state's
    distribution; rates of events in state :math:`j` are :math:`\lambda_j - \lambda_{j+1}`.
    """
    lam = np.asarray(ds_rates, dtype=float)
    mdr, c = check_damage_ratios(mean_damage_ratio, cov)
    if np.any(lam < 0) or np.any(~np.isfinite(lam)):
        raise ValueError("ds_rates must be non-negative and finite")
    v = np.asarray(value, dtype=float)
    r = net_loss_ratio(mdr, c, v[..., None], np.asarray(deductible, dtype=float)[..., None],
                       np.asarray(limit, dtype=float)[..., None])
    inc = np.diff(r, axis=-1, prepend=0.0)
    return v * np.sum(inc * lam, axis=-1)
