r"""Before/after arithmetic of a retrofit alternative: portfolio totals, changes, paired AAL change.

A what-if alternative changes the building class of some assets of a portfolio (the
*selected* assets) and leaves every other asset as it is.  Its effect is reported as
the value of each metric before (the run) and after (the alternative), their change
and relative change:

.. math:: \Delta = M_\text{after} - M_\text{before}, \qquad
          \delta = \Delta / M_\text{before} \quad (\delta = 0 \text{ if } \Delta = 0
          = M_\text{before}; \text{ NaN if only } M_\text{before} = 0).

Classical portfolio metrics are sums over the assets, so only the selected assets'
terms change (the totals are updated by their differences rather than summed again):

- expected annual loss [currency/yr]: :math:`\sum_i V_i\,\text{EAL}_i/V_i`;
- expected number of collapses in the horizon :math:`t` [-]: the sum of the assets'
  Poisson collapse probabilities :math:`1 - e^{-\lambda_{c,i} t}` (the expectation of a
  sum of Bernoulli variables is the sum of their probabilities);
- assets whose collapse probability in the target period exceeds the target [-].

Event-based metrics compare the same simulated years before and after (same events,
same ground-motion fields), so the standard error of the change in average annual loss
is that of the mean of the paired differences of year losses (common practice for
paired samples; it removes the sampling noise the two simulations share).
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

from quakefolio.core.curves import prob_in_years
from quakefolio.core.events.portfolio import aal_with_standard_error

__all__ = ["change", "AlternativeChange", "alternative_change", "paired_aal_change", "rerun_asset_aal"]


def change(before, after):
    r"""Change and relative change of a metric from ``before`` to ``after``.

    Parameters
    ----------
    before : array_like [any unit]
        Value of the metric before (the run).
    after : array_like [same unit]
        Value after (the alternative); broadcast against ``before``.

    Returns
    -------
    change : ndarray [same unit]
        :math:`\Delta = M_\text{after} - M_\text{before}`.
    relative_change : ndarray [-]
        :math:`\Delta / M_\text{before}`; 0 where both are zero (no change of nothing),
        NaN where only ``before`` is zero (undefined); no floating-point warnings (as
        for Python floats).

    Notes
    -----
    Plain arithmetic (common practice); one subtraction and one division per element,
    so a scalar call gives exactly the float arithmetic of ``after - before`` and
    ``(after - before) / before``.
    """
    before = np.asarray(before, dtype=float)
    after = np.asarray(after, dtype=float)
    nonzero = before != 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        delta = after - before
        relative = np.where(nonzero, delta / np.where(nonzero, before, 1.0), np.where(delta == 0, 0.0, np.nan))
    return delta, relative


class AlternativeChange(NamedTuple):
    """Per selected asset and portfolio metrics of one alternative (see :func:`alternative_change`).

    Per selected asset, shape (m,): ``eal_before``, ``eal_after`` [currency/yr],
    ``collapse_prob_before``, ``collapse_prob_after`` [-] (in the horizon),
    ``exceeds_target_before``, ``exceeds_target_after`` (bool).  Portfolio totals over
    every asset, as ``(before, after)`` pairs of floats: ``total_eal`` [currency/yr],
    ``expected_collapses`` [-] (in the horizon), ``assets_exceeding_target`` [-].
    """

    eal_before: np.ndarray
    eal_after: np.ndarray
    collapse_prob_before: np.ndarray
    collapse_prob_after: np.ndarray
    exceeds_target_before: np.ndarray
    exceeds_target_after: np.ndarray
    total_eal: tuple
    expected_collapses: tuple
    assets_exceeding_target: tuple


def alternative_change(value, eal_ratio, collapse_rate, selected, eal_ratio_after, collapse_rate_after, *,
                       horizon_yr, target_prob, target_years):
    r"""Classical before/after metrics of an alternative that changes the selected assets only.

    Parameters
    ----------
    value : array_like, shape (n,) [currency]
        Replacement value of every asset of the portfolio.
    eal_ratio : array_like, shape (n,) [1/yr]
        Expected annual loss over replacement value of every asset, before.
    collapse_rate : array_like, shape (n,) [1/yr]
        Annual collapse rate of every asset, before.
    selected : array_like of int, shape (m,)
        Indices of the assets the alternative changes.
    eal_ratio_after : array_like, shape (m,) [1/yr]
        EAL ratio of the selected assets after the change.
    collapse_rate_after : array_like, shape (m,) [1/yr]
        Annual collapse rate of the selected assets after the change.
    horizon_yr : float [yr]
        Horizon of the reported collapse probabilities.
    target_prob : float [-]
        Collapse probability target in ``target_years``.
    target_years : float [yr]
        Period of the target.

    Returns
    -------
    AlternativeChange
        Per selected asset: EAL [currency/yr], collapse probability in the horizon [-] and
        whether the collapse probability in ``target_years`` exceeds ``target_prob``, before
        and after; portfolio totals (before, after) of EAL [currency/yr], expected collapses
        in the horizon [-] and the number of assets over the target [-].

    Notes
    -----
    :math:`\text{EAL}_i = V_i\,r_i`; :math:`P_i = 1 - e^{-\lambda_{c,i} t}` (Poisson, Cornell
    1968; :func:`quakefolio.core.curves.prob_in_years`).  The totals after are the totals
    before less the selected assets' reductions:
    :math:`\sum_i \text{EAL}_i - \sum_{i \in S} (\text{EAL}_i - \text{EAL}'_i)`,
    :math:`\sum_i P_i - \sum_{i \in S} (P_i - P'_i)` (expected number of collapses, the sum
    of Bernoulli means), and the count over the target less the selected assets' count
    before plus their count after.
    """
    value = np.asarray(value, dtype=float)
    collapse_rate = np.asarray(collapse_rate, dtype=float)
    selected = np.asarray(selected, dtype=np.intp)
    eal_all = np.asarray(eal_ratio, dtype=float) * value
    exceed_all = prob_in_years(collapse_rate, target_years) > target_prob
    eal_before = eal_all[selected]
    eal_after = np.asarray(eal_ratio_after, dtype=float) * value[selected]
    p_before = prob_in_years(collapse_rate[selected], horizon_yr)
    p_after = prob_in_years(collapse_rate_after, horizon_yr)
    exceed_after = prob_in_years(collapse_rate_after, target_years) > target_prob
    collapses = prob_in_years(collapse_rate, horizon_yr)
    return AlternativeChange(
        eal_before, eal_after, p_before, p_after, exceed_all[selected], exceed_after,
        total_eal=(float(eal_all.sum()), float(eal_all.sum() - (eal_before - eal_after).sum())),
        expected_collapses=(float(collapses.sum()), float(collapses.sum() - (p_before - p_after).sum())),
        assets_exceeding_target=(float(exceed_all.sum()),
                                 float(exceed_all.sum() - exceed_all[selected].sum() + exceed_after.sum())),
    )


def paired_aal_change(year_losses_before, year_losses_after):
    r"""Average annual loss after a change and the standard error of the change, from paired years.

    Parameters
    ----------
    year_losses_before : array_like, shape (N,) [currency]
        Annual losses of N simulated years before the change, N >= 2.
    year_losses_after : array_like, shape (N,) [currency]
        Annual losses of the same simulated years after the change.

    Returns
    -------
    aal_after : float [currency/yr]
        Sample mean of the years after.
    standard_error_of_change : float [currency/yr]
        :math:`s_d/\sqrt{N}`, :math:`s_d` the sample standard deviation (``ddof=1``) of the
        paired differences :math:`d_y = L'_y - L_y`.

    Notes
    -----
    Paired-sample standard error of a mean difference (common practice), through
    :func:`quakefolio.core.events.portfolio.aal_with_standard_error`.
    """
    after = np.asarray(year_losses_after, dtype=float)
    aal, _ = aal_with_standard_error(after)
    _, se_change = aal_with_standard_error(after - np.asarray(year_losses_before, dtype=float))
    return float(aal), float(se_change)


def rerun_asset_aal(loss_sum, n_assets, changed, n_years):
    r"""Per-asset average annual loss of a rerun in which the changed assets were appended as new entries.

    Parameters
    ----------
    loss_sum : array_like, shape (n_assets + k,) [currency]
        Loss of every entry summed over all simulated events: the ``n_assets`` original
        entries (the changed ones with value zero), then one entry per changed asset
        under its new class.
    n_assets : int
        Number of assets of the portfolio.
    changed : array_like of int, shape (k,)
        Indices of the changed assets, in the order of their appended entries.
    n_years : int or float [yr]
        Number of simulated years.

    Returns
    -------
    ndarray, shape (n_assets,) [currency/yr]
        Sum over the events divided by the number of years; a changed asset takes the
        sum of its appended entry.

    Notes
    -----
    Average annual loss as the sample mean over simulated years (common practice).
    """
    loss_sum = np.asarray(loss_sum, dtype=float)
    changed = np.asarray(changed, dtype=np.intp)
    if loss_sum.shape != (n_assets + len(changed),):
        raise ValueError(f"loss_sum must have shape ({n_assets + len(changed)},) (assets then changed entries), "
                         f"got {loss_sum.shape}")
    per_asset = loss_sum[:n_assets].copy()
    per_asset[changed] = loss_sum[n_assets:]
    return per_asset / n_years
