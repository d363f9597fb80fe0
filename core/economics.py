r"""Engineering economics of risk reduction: annuity factor, present value, benefit-cost ratio.

Standard engineering-economics formulas (common practice, e.g. any engineering-economy
textbook's discrete compounding tables): a level amount :math:`A` received at the end of
each of :math:`T` years, discounted at the annual rate :math:`r`, is worth
:math:`A\,a(r, T)` today with the ordinary-annuity factor

.. math:: a(r, T) = \sum_{t=1}^{T} (1 + r)^{-t} = \frac{1 - (1 + r)^{-T}}{r},
          \qquad a(0, T) = T.

The benefit of a retrofit is the present value of the expected annual loss it avoids;
the benefit-cost ratio divides that present value by the retrofit cost.
"""
from __future__ import annotations

import numpy as np

__all__ = ["annuity_factor", "present_value", "benefit_cost_ratio"]


def annuity_factor(discount_rate, years):
    r"""Present value [yr] of a unit amount received at the end of every year for ``years`` years.

    Parameters
    ----------
    discount_rate : array_like [-], >= 0
        Annual discount rate (0.03 for 3%).
    years : array_like [yr], > 0
        Number of annual payments (need not be an integer).

    Returns
    -------
    ndarray [yr]
        The ordinary-annuity factor, broadcast over the two arguments.

    Raises
    ------
    ValueError
        If a discount rate is negative or NaN, or a number of years is not positive.

    Notes
    -----
    Ordinary annuity (common practice):
    :math:`a = \sum_{t=1}^{T}(1+r)^{-t} = (1 - (1+r)^{-T})/r`, and :math:`a = T` at
    :math:`r = 0`; computed as ``-expm1(-T log1p(r)) / r`` for accuracy at small rates.
    """
    r = np.asarray(discount_rate, dtype=float)
    t = np.asarray(years, dtype=float)
    if np.any(~(r >= 0)):
        raise ValueError(f"discount_rate must be non-negative, got {r!r}")
    if np.any(~(t > 0)):
        raise ValueError(f"years must be positive, got {t!r}")
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(r > 0, -np.expm1(-t * np.log1p(r)) / np.where(r > 0, r, 1.0), t)


def present_value(annual_amount, discount_rate, years):
    r"""Present value [currency] of a level annual amount received at the end of each year.

    Parameters
    ----------
    annual_amount : array_like [currency/yr]
        The amount received every year (e.g. an avoided expected annual loss).
    discount_rate : array_like [-], >= 0
    years : array_like [yr], > 0

    Returns
    -------
    ndarray [currency]
        :math:`A\,a(r, T)` with :math:`a` the ordinary-annuity factor
        (:func:`annuity_factor`; common practice).
    """
    return np.asarray(annual_amount, dtype=float) * annuity_factor(discount_rate, years)


def benefit_cost_ratio(benefit_pv, cost):
    r"""Benefit-cost ratio [-]: present value of the benefit over the cost.

    Parameters
    ----------
    benefit_pv : array_like [currency]
        Present value of the benefit (:func:`present_value` of the avoided annual loss).
    cost : array_like [currency]
        Cost incurred now (e.g. the retrofit cost).

    Returns
    -------
    ndarray [-]
        :math:`B/C` (common practice); ``inf`` or NaN where the cost is zero (no warning),
        so that a free alternative is not silently dropped.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(benefit_pv, dtype=float) / np.asarray(cost, dtype=float)
