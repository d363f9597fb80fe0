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
"""
from __future__ import annotations

import numpy as np
from scipy.special import betainc

__all__ = ["check_damage_ratios", "beta_parameters", "expected_annual_loss", "loss_exceedance_rates"]


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
        p_beta = 1.0 - betainc(np.where(random, a[..., None], 1.0), np.where(random, b[..., None], 1.0), l)
    p_det = (mdr[..., None] > l).astype(float)
    p = np.where(random, p_beta, p_det)  # (..., n_ds, n_l)
    return np.einsum("...j,...jl->...l", occ, p)
