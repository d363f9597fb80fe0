r"""Statistics of scenario earthquakes over realisations of the ground-motion field.

A scenario is one rupture with ``n`` realisations of its (possibly station-conditioned)
ground-motion field (:mod:`quakefolio.core.events.gmf`, :mod:`quakefolio.core.events.conditioning`).
Per building this module gives the damage-state probabilities averaged over the realisations
and the mean and percentiles of its loss; for the portfolio the distribution of the summed loss.

* Damage-state probability: :math:`\bar P_j = \frac1n\sum_r P^*_j(x_r)`, the enveloped lognormal
  fragility at each realisation's intensity (:func:`quakefolio.core.events.portfolio.exceedance_envelope`),
  i.e. the Monte Carlo estimate of :math:`E_x[P(DS \ge ds_j \mid x)]`. For a lognormal intensity
  :math:`\ln x \sim N(\mu, \sigma^2)` and a lognormal fragility (median :math:`\theta`, dispersion
  :math:`\beta`) its limit is :math:`\Phi\big((\mu - \ln\theta)/\sqrt{\beta^2 + \sigma^2}\big)`
  (common practice; checked in the tests).
* Percentiles of the realisations: the empirical quantile with linear interpolation between order
  statistics (Hyndman & Fan 1996, definition 7; numpy's default).

References
----------
Hyndman, R. J., Fan, Y. (1996). Sample quantiles in statistical packages. The American
Statistician 50(4), 361-365.
"""
from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray

from quakefolio.core.events.losses import event_loss_ratio
from quakefolio.core.events.portfolio import apply_policy, exceedance_envelope, expected_loss_ratios
from quakefolio.core.events.secondary import group_factors
from quakefolio.core.vulnerability import VulnerabilityTable, vulnerability_loss_ratios

__all__ = ["asset_realisation_losses", "mean_exceedance", "realisation_percentiles", "standard_error_of_mean"]

FloatArray = NDArray[np.float64]


def mean_exceedance(im: ArrayLike, medians: ArrayLike, betas: ArrayLike) -> FloatArray:
    r"""Probability [-] of reaching each damage state, averaged over realisations.

    Parameters
    ----------
    im : array_like, shape (n_realisations, n_points) [IM units]
        Intensity of every realisation at every point (0: no ground motion).
    medians, betas : array_like, shape (n_ds,)
        Ordered lognormal fragility (median [IM units], beta [-]).

    Returns
    -------
    ndarray, shape (n_points, n_ds) [-]
        :math:`\frac1n\sum_r P^*_j(x_{r,p})`, non-increasing along the last axis.
    """
    x = np.asarray(im, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0:
        raise ValueError(f"im must have shape (n_realisations >= 1, n_points); got {x.shape}")
    return exceedance_envelope(x, medians, betas).mean(axis=0)


def realisation_percentiles(values: ArrayLike, percentiles: ArrayLike, axis: int = 0) -> FloatArray:
    r"""Empirical percentiles of realisations (Hyndman & Fan 1996, definition 7).

    Parameters
    ----------
    values : array_like
        Realisations along ``axis`` (at least one).
    percentiles : array_like, shape (n_q,) [%]
        In [0, 100].
    axis : int

    Returns
    -------
    ndarray, shape (n_q,) + the other axes of ``values``
    """
    v = np.asarray(values, dtype=np.float64)
    q = np.asarray(percentiles, dtype=np.float64).ravel()
    if v.shape[axis] == 0:
        raise ValueError("values must hold at least one realisation")
    if q.size == 0 or np.any(~np.isfinite(q)) or np.any((q < 0) | (q > 100)):
        raise ValueError(f"percentiles must lie in [0, 100]; got {q.tolist()}")
    return np.percentile(v, q, axis=axis)


def standard_error_of_mean(values: ArrayLike, axis: int = 0) -> FloatArray:
    r"""Standard error [units of ``values``] of the mean over realisations, :math:`s/\sqrt{n}` (common practice).

    Parameters
    ----------
    values : array_like
        Realisations along ``axis``; with one realisation the result is 0.
    axis : int

    Returns
    -------
    ndarray
        The sample standard deviation (n - 1 in the denominator) over :math:`\sqrt n`.
    """
    v = np.asarray(values, dtype=np.float64)
    n = v.shape[axis]
    if n < 2:
        return np.zeros(np.delete(v.shape, axis))
    return np.std(v, axis=axis, ddof=1) / np.sqrt(n)


def asset_realisation_losses(im, classes, value, deductible, limit, *, loss_model, seed, blocks, correlation=0.0,
                             group=None):
    r"""Ground-up and net loss [currency] of every asset in every realisation.

    Parameters
    ----------
    im : ndarray, shape (n_realisations, n_ims, n_sites) [g]
        Sampled intensity at the sites (0 beyond the integration distance).
    classes : sequence of (assets, im index, medians, betas, mean damage ratio, cov, sites, pair)
        As :func:`quakefolio.core.events.losses.portfolio_event_losses` (a vulnerability class gives
        its :class:`~quakefolio.core.vulnerability.VulnerabilityTable` in place of the medians).
    value, deductible, limit : ndarray, shape (n_assets,) [currency]
        Replacement value and policy terms (NaN: none).
    loss_model : str
        ``"mean_damage_ratio"`` or a sampled mode (:func:`~quakefolio.core.events.losses.event_loss_ratio`).
    seed : int
        The run's seed.
    blocks : sequence of (block index, first row, stop row)
        The random-number blocks of the realisations.
    correlation : float
        Within-group correlation of sampled damage and loss ratios, in [0, 1].
    group : ndarray of int, shape (n_assets,), or None
        Group of each asset (needed when sampling with ``correlation > 0``).

    Returns
    -------
    ground_up, net : ndarray, shape (n_realisations, n_assets) [currency]

    Notes
    -----
    The same per-asset arithmetic as the event-based stage
    (:func:`quakefolio.core.events.losses.portfolio_event_losses`), kept per asset instead of summed:
    in the mean mode the expected ground-up and net loss given the intensity (terms over the loss
    distribution, closed form); sampled, the terms on each drawn loss
    (:func:`quakefolio.core.events.portfolio.apply_policy`).
    """
    value = np.asarray(value, dtype=np.float64)
    n_ev = im.shape[0]
    gu = np.zeros((n_ev, value.size))
    net = np.zeros((n_ev, value.size))
    shared = loss_model != "mean_damage_ratio" and correlation > 0
    factors = group_factors(seed, blocks, int(np.max(group)) + 1 if group is not None and len(group) else 0) \
        if shared else None
    for k, (assets, i_im, medians, betas, mdr, cov, usites, pair) in enumerate(classes):
        x = im[:, i_im, usites]
        if loss_model == "mean_damage_ratio":
            if isinstance(medians, VulnerabilityTable):
                ratio, net_ratio = vulnerability_loss_ratios(x, *medians, value[assets], deductible[assets],
                                                             limit[assets], pair=pair)
            else:
                ratio, net_ratio = expected_loss_ratios(x, medians, betas, mdr, cov, value[assets],
                                                        deductible[assets], limit[assets], pair=pair)
            gu[:, assets] = ratio * value[assets]
            net[:, assets] = net_ratio * value[assets]
            continue
        ratio = event_loss_ratio(x, medians, betas, mdr, cov, pair, loss_model=loss_model, seed=seed, blocks=blocks,
                                 class_entry=k, correlation=correlation,
                                 factors=None if factors is None else factors[:, group[assets]])
        gu[:, assets] = ratio * value[assets]
        net[:, assets] = apply_policy(gu[:, assets], deductible[assets], limit[assets])
    return gu, net
