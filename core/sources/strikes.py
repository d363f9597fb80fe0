r"""Distributions of strike for point and area sources.

A point or area source's ruptures are finite planes (:mod:`quakefolio.core.sources.ruptures`),
so their strike decides where a site lies relative to each plane: Rx (its sign says hanging
wall or footwall, and with it every hanging-wall term of the ground-motion models), Ry0 and,
for long ruptures, Rjb and Rrup. One listed strike imposes one orientation on every rupture of
the source; where the orientation is not known, a distribution of strikes spreads the rate
over several (:func:`strike_distribution`), for instance evenly over the compass
(:func:`uniform_strikes`).

:func:`mechanisms_with_strikes` crosses mechanisms given without strike with a strike
distribution into the ``(strike, dip, rake, weight)`` mechanisms the rupture builders take,
each weight the product of the two (the rate of every rupture is split by it).
"""
from __future__ import annotations

import math
from typing import Sequence

import numpy as np
from numpy.typing import NDArray

__all__ = ["uniform_strikes", "strike_distribution", "mechanisms_with_strikes", "WEIGHT_SUM_TOLERANCE",
           "MAX_UNIFORM_STRIKES"]

#: Weights of a distribution must sum to 1 within this (as the builders' other distributions).
WEIGHT_SUM_TOLERANCE = 1e-6
#: Most strikes of :func:`uniform_strikes`: one per degree.
MAX_UNIFORM_STRIKES = 360


def uniform_strikes(n: int) -> NDArray[np.float64]:
    """``n`` strikes evenly spread over the compass with equal weights.

    Parameters
    ----------
    n : int
        Number of strikes, 1 to :data:`MAX_UNIFORM_STRIKES`.

    Returns
    -------
    ndarray, shape (n, 2)
        ``(strike_deg, weight)`` rows: strikes :math:`360 k / n` [deg] for
        :math:`k = 0, \\dots, n - 1`, weights :math:`1 / n`.

    Notes
    -----
    A strike :math:`\\phi` and :math:`\\phi + 180` give the same plane dipping the other way, so
    with dipping mechanisms the whole compass (not half of it) spreads both the strike and the dip
    direction evenly; with an even ``n`` both of each pair are present.
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or not 1 <= n <= MAX_UNIFORM_STRIKES:
        raise ValueError(f"uniform_strikes must be a whole number from 1 to {MAX_UNIFORM_STRIKES}; got {n!r}")
    k = np.arange(int(n), dtype=np.float64)
    return np.stack([360.0 * k / n, np.full(k.size, 1.0 / n)], axis=1)


def strike_distribution(strikes: Sequence[Sequence[float]]) -> NDArray[np.float64]:
    """A validated strike distribution, its weights scaled to sum to exactly 1.

    Parameters
    ----------
    strikes : sequence of (strike_deg, weight)
        Strikes [deg] in [0, 360), each at most once; weights > 0 summing to 1 (within
        :data:`WEIGHT_SUM_TOLERANCE`).

    Returns
    -------
    ndarray, shape (k, 2)

    Raises
    ------
    ValueError
        Naming the entry and the constraint it breaks.
    """
    try:
        arr = np.array([tuple(float(v) for v in row) for row in strikes], dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError("strikes must be a list of [strike_deg, weight] pairs") from exc
    if arr.ndim != 2 or arr.shape[1] != 2 or arr.shape[0] == 0 or not np.all(np.isfinite(arr)):
        raise ValueError("strikes must be a non-empty list of [strike_deg, weight] pairs of finite numbers")
    for i, (strike, weight) in enumerate(arr):
        if not 0.0 <= strike < 360.0:
            raise ValueError(f"strike {strike:g} (entry {i + 1}) must lie in [0, 360) degrees")
        if not weight > 0.0:
            raise ValueError(f"weight {weight:g} (entry {i + 1}) must be > 0")
    _, count = np.unique(arr[:, 0], return_counts=True)
    if np.any(count > 1):
        twice = arr[np.isin(arr[:, 0], np.unique(arr[:, 0])[count > 1]), 0][0]
        raise ValueError(f"strike {twice:g} is listed twice; give each strike once with its whole weight")
    total = float(arr[:, 1].sum())
    if not math.isclose(total, 1.0, rel_tol=0.0, abs_tol=WEIGHT_SUM_TOLERANCE):
        raise ValueError(f"the weights of strikes must sum to 1; they sum to {total:.9g}")
    arr[:, 1] /= total
    return arr


def mechanisms_with_strikes(mechanisms: Sequence[Sequence[float]], strikes) -> list[tuple[float, float, float, float]]:
    """Every (mechanism, strike) combination as a ``(strike, dip, rake, weight)`` mechanism.

    Parameters
    ----------
    mechanisms : sequence of (dip_deg, rake_deg, weight)
        Mechanisms without strike; their weights are checked by the rupture builders.
    strikes : array_like, shape (k, 2)
        ``(strike_deg, weight)`` from :func:`strike_distribution` or :func:`uniform_strikes`.

    Returns
    -------
    list of (strike_deg, dip_deg, rake_deg, weight)
        Mechanisms outermost, strikes innermost; weight = mechanism weight x strike weight
        (independent mechanism and strike), so the ruptures' rates split by both.
    """
    table = np.asarray(strikes, dtype=np.float64).reshape(-1, 2)
    out = []
    for mech in mechanisms:
        if len(mech) != 3:
            raise ValueError(f"a mechanism without strike is (dip_deg, rake_deg, weight); got {tuple(mech)!r}")
        dip, rake, w_mech = (float(v) for v in mech)
        out.extend((float(s), dip, rake, w_mech * float(w)) for s, w in table)
    return out
