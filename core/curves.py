r"""Hazard-curve arithmetic: validation, log-log interpolation, Poisson conversions.

A tabulated hazard curve is a set of intensity levels :math:`x_0 < x_1 < \dots < x_{n-1}`
[IM units, usually g] with annual exceedance rates
:math:`\lambda_0 \ge \lambda_1 \ge \dots \ge 0` [1/yr].  Between two tabulated points
the curve is a local power law (straight in log-log space),

.. math:: \lambda(x) = \lambda_i (x / x_i)^{-k_i}, \qquad
          k_i = \ln(\lambda_i/\lambda_{i+1}) / \ln(x_{i+1}/x_i),

which is the interpolation every function of this package uses, so that values read
off a curve and the damage integrals of :mod:`quakefolio.core.risk` agree exactly.  A
power law cannot reach zero: on a segment that ends at a zero rate the rate falls
linearly in :math:`\ln x` to zero (documented convention of this package).

Outside the tabulated range the functions return NaN; they never extrapolate
silently.

Shapes: ``im_levels`` and ``rates`` are ``(n_levels,)`` for one curve or
``(..., n_levels)`` for a batch of curves (the batch shape is written ``C`` below).
"""
from __future__ import annotations

import numpy as np

__all__ = [
    "validate_curve",
    "rate_at_im",
    "im_at_rate",
    "prob_in_years",
    "rate_from_prob",
    "return_period",
    "segment_exponents",
    "interpolate_period",
    "NoCommonRates",
]


class NoCommonRates(ValueError):
    """Neighbouring curves of one site share no range of positive rates (period interpolation).

    Attributes
    ----------
    index : tuple of int
        Batch index of the first such site (``()`` for a single curve).
    neighbour : int
        1 or 2: the neighbouring curve to blame (the one whose rates are all zero, else 2).
    ranges : str
        The two curves' ranges of positive rates, in words.
    """

    def __init__(self, index, neighbour, ranges):
        super().__init__(f"neighbouring curves share no common range of positive rates ({ranges})")
        self.index, self.neighbour, self.ranges = index, neighbour, ranges


def validate_curve(im_levels, rates, *, name="hazard curve"):
    """Check tabulated hazard curves and return them as float arrays.

    Parameters
    ----------
    im_levels : array_like, shape (..., n_levels) [IM units]
        Positive, finite, strictly increasing along the last axis.
    rates : array_like, shape (..., n_levels) [1/yr]
        Finite, non-negative, non-increasing along the last axis.
    name : str
        Used in error messages.

    Returns
    -------
    im_levels, rates : ndarray
        Broadcast against each other.

    Raises
    ------
    ValueError
        Naming the constraint, the offending curve index and level index (in the array
        given: levels shared by every curve are checked once), and the value received.
    """
    x = np.asarray(im_levels, dtype=float)
    lam = np.asarray(rates, dtype=float)
    if x.ndim == 0 or lam.ndim == 0:
        raise ValueError(f"{name}: im_levels and rates must be arrays, got scalars")
    if x.shape[-1] != lam.shape[-1]:
        raise ValueError(
            f"{name}: im_levels has {x.shape[-1]} levels but rates has {lam.shape[-1]}"
        )
    if x.shape[-1] < 2:
        raise ValueError(f"{name}: at least 2 levels are needed, got {x.shape[-1]}")
    try:
        np.broadcast_shapes(x.shape, lam.shape)
    except ValueError as exc:
        raise ValueError(
            f"{name}: im_levels shape {x.shape} does not broadcast with rates shape {lam.shape}"
        ) from exc

    def _where(mask):
        idx = np.argwhere(mask)[0]
        return tuple(int(i) for i in idx)

    bad = ~np.isfinite(x) | (x <= 0)
    if bad.any():
        i = _where(bad)
        raise ValueError(f"{name}: im_levels must be positive and finite, got {float(x[i]):g} at index {i}")
    bad = ~np.isfinite(lam) | (lam < 0)
    if bad.any():
        i = _where(bad)
        raise ValueError(f"{name}: rates must be non-negative and finite, got {float(lam[i]):g} at index {i}")
    bad = np.diff(x, axis=-1) <= 0
    if bad.any():
        i = _where(bad)
        j = i[:-1] + (i[-1] + 1,)
        raise ValueError(
            f"{name}: im_levels must be strictly increasing, got {float(x[i]):g} then {float(x[j]):g} at index {j}"
        )
    bad = np.diff(lam, axis=-1) > 0
    if bad.any():
        i = _where(bad)
        j = i[:-1] + (i[-1] + 1,)
        raise ValueError(
            f"{name}: rates must be non-increasing with im level, got {float(lam[i]):g} then {float(lam[j]):g} "
            f"at index {j}"
        )
    return tuple(np.broadcast_arrays(x, lam))  # checked before: levels shared by curves once


def segment_exponents(im_levels, rates):
    r"""Local power-law exponents :math:`k_i` of each segment of a log-log curve.

    Parameters
    ----------
    im_levels, rates : ndarray, shape (..., n_levels)
        Validated hazard curves [IM units], [1/yr].

    Returns
    -------
    k : ndarray, shape (..., n_levels - 1)
        :math:`k_i = \ln(\lambda_i/\lambda_{i+1})/\ln(x_{i+1}/x_i) \ge 0`; ``inf`` where
        the segment ends at a zero rate, 0 where both rates are zero.
    """
    lnx = np.log(im_levels)
    with np.errstate(divide="ignore", invalid="ignore"):
        lnlam = np.log(rates)
        dlam = lnlam[..., :-1] - lnlam[..., 1:]
        k = dlam / np.diff(lnx, axis=-1)
    k = np.where(rates[..., :-1] == 0, 0.0, k)
    return k


def _prepare_points(values):
    """Give query points a trailing axis so that they broadcast against curves."""
    v = np.asarray(values, dtype=float)
    scalar = v.ndim == 0
    if scalar:
        v = v[None]
    return v, scalar


def rate_at_im(im, im_levels, rates):
    r"""Annual exceedance rate [1/yr] at ``im`` by log-log interpolation.

    Parameters
    ----------
    im : float or array_like, shape (k,) or C + (k,) [IM units]
        Intensity levels at which to read every curve.
    im_levels : array_like, shape (n_levels,) or C + (n_levels,) [IM units]
    rates : array_like, shape (n_levels,) or C + (n_levels,) [1/yr]

    Returns
    -------
    ndarray, shape C (scalar ``im``) or C + (k,)
        NaN where ``im`` lies outside ``[x_0, x_{n-1}]``.

    Notes
    -----
    Between tabulated points the curve is a local power law,
    :math:`\lambda(x) = \lambda_i (x/x_i)^{-k_i}`; on a segment ending at a zero rate,
    :math:`\lambda` falls linearly in :math:`\ln x`.
    """
    x, lam = validate_curve(im_levels, rates)
    q, scalar = _prepare_points(im)
    n = x.shape[-1]
    xq = q[..., :, None]  # (..., k, 1)
    xs = x[..., None, :]  # (..., 1, n)
    idx = np.sum(xs <= xq, axis=-1) - 1  # segment index, -1 below range
    inside = (q >= x[..., :1]) & (q <= x[..., -1:])
    i0 = np.clip(idx, 0, n - 2)
    shape = np.broadcast_shapes(i0.shape, x.shape[:-1] + (1,))
    xb = np.broadcast_to(x, shape[:-1] + (n,))
    lb = np.broadcast_to(lam, shape[:-1] + (n,))
    i0 = np.broadcast_to(i0, shape)
    x0 = np.take_along_axis(xb, i0, axis=-1)
    x1 = np.take_along_axis(xb, i0 + 1, axis=-1)
    l0 = np.take_along_axis(lb, i0, axis=-1)
    l1 = np.take_along_axis(lb, i0 + 1, axis=-1)
    qb = np.broadcast_to(q, shape)
    t = np.log(qb / x0) / np.log(x1 / x0)
    with np.errstate(divide="ignore", invalid="ignore"):
        power = l0 * np.exp(t * np.log(l1 / l0))
    linear = l0 * (1.0 - t)
    out = np.where(l0 == 0, 0.0, np.where(l1 > 0, power, linear))
    out = np.where(qb == x0, l0, np.where(qb == x1, l1, out))  # exact at tabulated points
    out = np.where(np.broadcast_to(inside, shape), out, np.nan)
    return out[..., 0] if scalar else out


def im_at_rate(rate, im_levels, rates):
    r"""Intensity [IM units] whose annual exceedance rate is ``rate``, log-log interpolated.

    Parameters
    ----------
    rate : float or array_like, shape (k,) or C + (k,) [1/yr]
        Target rates, positive.
    im_levels, rates : array_like, shape (n_levels,) or C + (n_levels,)

    Returns
    -------
    ndarray, shape C (scalar ``rate``) or C + (k,)
        NaN where ``rate`` lies outside the tabulated range of rates
        (above :math:`\lambda_0`, below the smallest tabulated rate, or not positive).
        On a flat segment the smallest intensity with that rate is returned.

    Notes
    -----
    Inverse of the local power law: :math:`\ln x = \ln x_i + \ln(\lambda_i/\lambda)/k_i`;
    on a segment ending at zero rate, :math:`\ln x = \ln x_i + (1-\lambda/\lambda_i)\,\Delta\ln x`.
    """
    x, lam = validate_curve(im_levels, rates)
    q, scalar = _prepare_points(rate)
    n = x.shape[-1]
    rq = q[..., :, None]
    ls = lam[..., None, :]
    # first index whose rate is <= target: the target lies on segment (idx-1, idx)
    cnt = np.sum(ls > rq, axis=-1)  # number of levels with rate strictly above target
    shape = np.broadcast_shapes(cnt.shape, x.shape[:-1] + (1,))
    cnt = np.broadcast_to(cnt, shape)
    qb = np.broadcast_to(q, shape)
    xb = np.broadcast_to(x, shape[:-1] + (n,))
    lb = np.broadcast_to(lam, shape[:-1] + (n,))
    lam_min = lb[..., -1:]
    lam_max = lb[..., :1]
    inside = (qb > 0) & (qb <= lam_max) & (qb >= lam_min)
    i1 = np.clip(cnt, 1, n - 1)
    i0 = i1 - 1
    x0 = np.take_along_axis(xb, i0, axis=-1)
    x1 = np.take_along_axis(xb, i1, axis=-1)
    l0 = np.take_along_axis(lb, i0, axis=-1)
    l1 = np.take_along_axis(lb, i1, axis=-1)
    dlnx = np.log(x1 / x0)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = np.log(l0 / l1) / dlnx
        ln_power = np.log(x0) + np.log(l0 / qb) / k
        ln_linear = np.log(x0) + (1.0 - qb / l0) * dlnx
    lnx = np.where(l1 > 0, ln_power, ln_linear)
    out = np.exp(lnx)
    # exactly on a tabulated rate (also covers flat segments): smallest such level
    hit = lb[..., None, :] == qb[..., :, None]
    first_hit = np.argmax(hit, axis=-1)
    out = np.where(hit.any(axis=-1), np.take_along_axis(xb, first_hit, axis=-1), out)
    out = np.where(inside, out, np.nan)
    return out[..., 0] if scalar else out


def prob_in_years(rate, years):
    r"""Probability of at least one exceedance in ``years`` [-] for a Poisson process.

    Parameters
    ----------
    rate : array_like [1/yr], non-negative
    years : array_like [yr], positive

    Notes
    -----
    :math:`P = 1 - \exp(-\lambda t)`, computed as ``-expm1(-rate*years)`` for accuracy at
    small rates (Poisson occurrence, Cornell 1968).
    """
    lam = np.asarray(rate, dtype=float)
    t = np.asarray(years, dtype=float)
    if np.any(lam < 0) or np.any(np.isnan(lam)):
        raise ValueError(f"rate must be non-negative, got min {np.nanmin(lam) if lam.size else lam!r}")
    if np.any(~(t > 0)):
        raise ValueError(f"years must be positive, got {t!r}")
    return -np.expm1(-lam * t)


def rate_from_prob(prob, years):
    r"""Annual rate [1/yr] whose Poisson probability of occurrence in ``years`` is ``prob``.

    Notes
    -----
    :math:`\lambda = -\ln(1 - P)/t`, computed as ``-log1p(-prob)/years``.
    """
    p = np.asarray(prob, dtype=float)
    t = np.asarray(years, dtype=float)
    if np.any(~((p >= 0) & (p < 1))):
        raise ValueError(f"prob must lie in [0, 1), got {p!r}")
    if np.any(~(t > 0)):
        raise ValueError(f"years must be positive, got {t!r}")
    return -np.log1p(-p) / t


def return_period(rate):
    r"""Return period [yr] of an annual rate: :math:`T = 1/\lambda` (inf for a zero rate)."""
    lam = np.asarray(rate, dtype=float)
    if np.any(lam < 0) or np.any(np.isnan(lam)):
        raise ValueError("rate must be non-negative and not NaN")
    with np.errstate(divide="ignore"):
        return 1.0 / lam


def interpolate_period(period_target_s, period_1_s, levels_1, rates_1, period_2_s, levels_2, rates_2,
                       n_points=None):
    r"""Hazard curves at an untabulated oscillator period, log-log across periods.

    Uniform-hazard interpolation: at each of a set of rates :math:`r` (log-spaced over
    the range common to both neighbouring curves), the intensities of the two curves
    are read off by log-log interpolation and interpolated linearly in
    :math:`\ln T`:

    .. math:: \ln x_T(r) = \ln x_1(r) + \frac{\ln T - \ln T_1}{\ln T_2 - \ln T_1}
              \left[\ln x_2(r) - \ln x_1(r)\right]

    (common practice for spectral ordinates between tabulated periods).

    A site whose neighbouring curves are both zero at every level (no hazard) gets a zero
    curve, its levels log-spaced between the end levels of the neighbours interpolated in
    the same way.

    Parameters
    ----------
    period_target_s, period_1_s, period_2_s : float [s]
        ``period_1_s < period_target_s < period_2_s``.
    levels_1, rates_1, levels_2, rates_2 : ndarray, shape C + (n_levels,)
        Neighbouring curves [g], [1/yr] for the same sites.
    n_points : int, optional
        Number of rates in the new curves (default: the larger level count).

    Returns
    -------
    levels, rates : ndarray, shape C + (n_points,)

    Raises
    ------
    NoCommonRates
        At the first site whose two curves share no range of positive rates (one of them
        zero everywhere, or their rate ranges disjoint or touching at one point).
    """
    t, t1, t2 = float(period_target_s), float(period_1_s), float(period_2_s)
    if not (0 < t1 < t < t2):
        raise ValueError(f"periods must satisfy 0 < T1 < T < T2, got T1={t1}, T={t}, T2={t2}")
    x1, l1 = validate_curve(levels_1, rates_1, name="hazard curve at period 1")
    x2, l2 = validate_curve(levels_2, rates_2, name="hazard curve at period 2")
    n = int(n_points or max(x1.shape[-1], x2.shape[-1]))

    def positive_min(lam):
        return np.min(np.where(lam > 0, lam, np.inf), axis=-1)

    quiet = (l1[..., 0] == 0) & (l2[..., 0] == 0)  # no hazard at either period
    r_hi = np.minimum(l1[..., 0], l2[..., 0])
    r_lo = np.maximum(positive_min(l1), positive_min(l2))
    bad = ~(r_hi > r_lo) & ~quiet
    if np.any(bad):
        i = tuple(int(k) for k in np.argwhere(bad)[0])
        span = [(float(l[i][0]), float(np.min(np.where(l[i] > 0, l[i], np.inf)))) for l in (l1, l2)]
        blame = 1 if l1[i][0] == 0 else 2
        raise NoCommonRates(i, blame, f"{_rate_span(*span[0])} and {_rate_span(*span[1])}")
    if np.any(quiet):  # placeholder curves for the quiet sites; their results are replaced below
        dummy = quiet[..., None]
        x1, l1 = np.where(dummy, x1[..., :1] * np.arange(1, x1.shape[-1] + 1), x1), np.where(dummy, 1.0, l1)
        x2, l2 = np.where(dummy, x2[..., :1] * np.arange(1, x2.shape[-1] + 1), x2), np.where(dummy, 1.0, l2)
        r_hi, r_lo = np.where(quiet, 1.0, r_hi), np.where(quiet, 0.5, r_lo)
    u = np.linspace(0.0, 1.0, n)
    r = np.exp(np.log(r_hi)[..., None] + u * (np.log(r_lo) - np.log(r_hi))[..., None])  # decreasing
    r[..., 0], r[..., -1] = r_hi, r_lo  # exact end points: no round-off outside the range
    ln_x1 = np.log(im_at_rate(r, x1, l1))
    ln_x2 = np.log(im_at_rate(r, x2, l2))
    w = (np.log(t) - np.log(t1)) / (np.log(t2) - np.log(t1))
    ln_x = ln_x1 + w * (ln_x2 - ln_x1)
    if not np.any(quiet):
        return np.exp(ln_x), r
    return _with_quiet_sites(np.exp(ln_x), r, quiet, levels_1, levels_2, w, u)


def _rate_span(hi, lo):
    if hi == 0:
        return "0 at every level"
    return f"{lo:.3g} to {hi:.3g} /yr"


def _with_quiet_sites(levels, rates, quiet, levels_1, levels_2, w, u):
    """Zero curves at the ``quiet`` sites, levels log-spaced between the interpolated end levels."""
    x1 = np.broadcast_to(np.asarray(levels_1, dtype=float), quiet.shape + (np.shape(levels_1)[-1],))
    x2 = np.broadcast_to(np.asarray(levels_2, dtype=float), quiet.shape + (np.shape(levels_2)[-1],))
    ln_lo = np.log(x1[..., 0]) + w * (np.log(x2[..., 0]) - np.log(x1[..., 0]))
    ln_hi = np.log(x1[..., -1]) + w * (np.log(x2[..., -1]) - np.log(x1[..., -1]))
    grid = np.exp(ln_lo[..., None] + u * (ln_hi - ln_lo)[..., None])
    return np.where(quiet[..., None], grid, levels), np.where(quiet[..., None], 0.0, rates)
