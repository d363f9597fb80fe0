r"""Classical probabilistic seismic hazard: curves, logic-tree statistics, disaggregation.

The annual rate at which intensity :math:`x` is exceeded at a site is the discretised
hazard integral (Cornell 1968; McGuire 2004, Ch. 3)

.. math:: \lambda(IM > x) = \sum_r \nu_r\, P(IM > x \mid r, \text{site}),

summed over ruptures :math:`r` with annual rates :math:`\nu_r` whose distance to the
site is within the integration distance.  Ground-motion residuals are lognormal:
:math:`\ln IM = \mu_r + \sigma_r\varepsilon`, :math:`\varepsilon \sim N(0, 1)`,
optionally truncated symmetrically at :math:`\pm n` and renormalised, so that

.. math:: P(IM > x) = \frac{\Phi(-\varepsilon_x) - \Phi(-n)}{1 - 2\Phi(-n)},\quad
          \varepsilon_x = (\ln x - \mu_r)/\sigma_r,

clipped to [0, 1].  With :math:`\sigma_r = 0` the exceedance is the step
:math:`\mathbf{1}[\ln x < \mu_r]`.

Disaggregation (Bazzurro & Cornell 1999) splits the rate of exceeding a target level
:math:`x^*` into the contributions :math:`\nu_r P(IM > x^* \mid r)` of each (site,
rupture) pair, binned by magnitude, distance and epsilon; the mean magnitude, distance
and epsilon are the exact contribution-weighted means over the pairs (not bin centres).
Epsilon is the one needed to reach the target level,
:math:`\varepsilon^* = (\ln x^* - \mu_{\ln Y})/\sigma_{\ln Y}` with the model's median and
standard deviation for the pair (Bazzurro & Cornell 1999; McGuire 1995).

Work is organised as flat *pairs* (site, rupture) that survive the distance cut-off,
sorted by site, so that one vectorised pass evaluates every pair and level and a
segmented sum (``np.add.reduceat``) gathers the curves per site.

References
----------
Cornell, C.A. (1968). Engineering seismic risk analysis. BSSA 58(5), 1583-1606.
McGuire, R.K. (2004). Seismic Hazard and Risk Analysis. EERI Monograph MNO-10.
Bazzurro, P., Cornell, C.A. (1999). Disaggregation of seismic hazard. BSSA 89(2), 501-520.
McGuire, R.K. (1995). Probabilistic seismic hazard analysis and design earthquakes: closing
the loop. BSSA 85(5), 1275-1284.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.curves import im_at_rate
from quakefolio.core.pairs import (
    block_pairs, check_event_model, model_input, model_values, pair_blocks, pair_segments, region_parts,
)

sp = lazy_module("scipy.sparse")
special = lazy_module("scipy.special")

__all__ = [
    "exceedance_probability",
    "truncation_window",
    "pair_index",
    "site_chunks",
    "hazard_from_pairs",
    "weighted_mean",
    "weighted_sum",
    "weighted_fractiles",
    "DisaggBins",
    "DISAGG_MOMENTS",
    "disaggregation_from_pairs",
    "disaggregation_means",
    "disaggregation_summary",
    "uniform_hazard_targets",
    "compute_site_hazard",
    "compute_disaggregation",
    "values_key",
    "rupture_ground_motion",
]


def exceedance_probability(ln_levels, ln_median, sigma, truncation_sigma=None, *, out=None, scratch=None):
    r"""P(IM > x) [-] for lognormal residuals, optionally truncated at ``truncation_sigma``.

    Parameters
    ----------
    ln_levels : array_like, shape (n_levels,) [ln g]
    ln_median : array_like, shape S [ln g]
    sigma : array_like, shape S [ln units], >= 0
    truncation_sigma : float or None
        Symmetric truncation :math:`n > 0` of the standard normal residual; None
        for no truncation.
    out : ndarray or None
        Float array of the output's shape to write into (a work buffer reused by the
        engine).
    scratch : ndarray or None
        Float array of at least (n_levels, n) for a 1-D ``ln_median`` of length n: the
        standardised values are computed level by level there (long contiguous loops),
        then copied; the same values.

    Returns
    -------
    ndarray, shape S + (n_levels,)

    Notes
    -----
    Module notes: :math:`[\Phi(-\varepsilon) - \Phi(-n)]/[1 - 2\Phi(-n)]`, clipped to
    [0, 1]; a zero sigma gives the step :math:`\mathbf{1}[\ln x < \mu]`.  Computed in
    place on one array of the output's size (this is the hot loop of the engine).  With
    truncation, :math:`\Phi` is evaluated only inside the window where the result is
    not exactly 0 or 1 (:func:`truncation_window`); outside it the clipped value is
    written directly, so every value is bit for bit the one of the full evaluation.
    """
    mu = np.asarray(ln_median, dtype=float)[..., None]
    sd = np.asarray(sigma, dtype=float)[..., None]
    lnx = np.asarray(ln_levels, dtype=float)
    if truncation_sigma is not None and not truncation_sigma > 0:
        raise ValueError(f"truncation_sigma must be positive or None, got {truncation_sigma!r}")
    if np.any(sd < 0) or np.any(~np.isfinite(sd)):
        raise ValueError("sigma must be finite and non-negative")
    zero = sd == 0
    any_zero = bool(zero.any())
    with np.errstate(divide="ignore", invalid="ignore"):
        if scratch is not None and mu.ndim == 2:
            zt = scratch[:len(lnx), :mu.shape[0]]
            np.subtract(mu[:, 0], lnx[:, None], out=zt)  # -epsilon_x * sigma, level by level
            zt *= 1.0 / sd[:, 0]
            p = np.empty(mu.shape[:1] + lnx.shape) if out is None else out
            np.copyto(p, zt.T)
        else:
            p = np.subtract(mu, lnx, out=out)  # -epsilon_x * sigma
            p *= 1.0 / sd
    if any_zero:
        p[...] = np.where(zero, np.where(p > 0, np.inf, -np.inf), p)  # step: 1[ln x < mu]
    if truncation_sigma is None:
        special.ndtr(p, out=p)
        return p
    pn = special.ndtr(-truncation_sigma)
    lo, hi = truncation_window(truncation_sigma)
    above = p > hi
    outside = p < lo
    outside |= above  # NaN stays inside (evaluated, stays NaN)
    if not outside.any():
        return _truncated(p, pn)
    inside = ~outside
    values = _truncated(p[inside], pn)  # (scipy's ufuncs are not called with where=: wrong values)
    np.copyto(p, above)  # exactly 1 above the window, 0 below it
    p[inside] = values
    return p


def _truncated(z, pn):
    """In place: clip((Phi(z) - pn) / (1 - 2 pn), 0, 1), the truncated exceedance."""
    special.ndtr(z, out=z)
    z -= pn
    z *= 1.0 / (1.0 - 2.0 * pn)
    np.clip(z, 0.0, 1.0, out=z)
    return z


def truncation_window(truncation_sigma):
    r"""Standardised bounds [-] outside which the truncated exceedance is exactly 0 or 1.

    Parameters
    ----------
    truncation_sigma : float
        Truncation :math:`n > 0`.

    Returns
    -------
    lo, hi : float
        For :math:`z < lo`, :math:`\Phi(z) < \Phi(-n)(1 - 10^{-6})`, so
        :math:`\Phi(z) - \Phi(-n)` is negative whatever the round-off (relative
        accuracy of :math:`\Phi` near 1e-15) and the clipped value is 0; for
        :math:`z > hi`, :math:`\Phi(z) - \Phi(-n) > 1 - 2\Phi(-n) + 10^{-9}`, so the
        clipped value is 1.  ``lo`` is :math:`-\infty` where :math:`\Phi(-n)` underflows,
        ``hi`` is :math:`+\infty` where :math:`\Phi(-n) \le 2 \cdot 10^{-9}` (no upper
        shortcut: the excess over 1 would be below the round-off).

    Notes
    -----
    Bounds from the normal quantile function (``scipy.special.ndtri``) with margins
    far above the round-off, so evaluating only inside the window changes no bit.
    """
    pn = float(special.ndtr(-truncation_sigma))
    lo = float(special.ndtri(pn * (1.0 - 1e-6))) if pn > 0 else -np.inf
    hi = float(-special.ndtri(pn - 1e-9)) if pn > 2e-9 else np.inf
    return lo, hi


def pair_index(mask):
    """Flat (site, rupture) pairs of a boolean mask, sorted by site, and segment starts.

    Parameters
    ----------
    mask : ndarray of bool, shape (n_sites, n_ruptures)

    Returns
    -------
    site, rupture : ndarray of int, shape (n_pairs,)
    starts : ndarray of int
        First pair of each site that has pairs (for ``np.add.reduceat``).
    sites_with_pairs : ndarray of int
        The sites the segments belong to.
    """
    site, rup = np.nonzero(mask)  # row-major: already sorted by site
    return pair_segments(site, rup)


#: Target (pair x level) values per pass of :func:`hazard_from_pairs`: the pass's work
#: arrays (about 2 MB) stay in one core's L2 cache; a site with more pairs is one pass.
CHUNK_VALUES = 1 << 16


def site_chunks(starts, n_pairs, chunk):
    """Passes of whole sites with at most ``chunk`` pairs each (one site per pass if larger).

    Parameters
    ----------
    starts : ndarray of int
        First pair of each site (:func:`pair_index`).
    n_pairs : int
    chunk : int
        Pairs per pass.

    Returns
    -------
    list of (lo, hi, first, last)
        Sites ``lo:hi`` (indices into ``starts``) and their pairs ``first:last``.
    """
    seg_end = np.append(starts[1:], n_pairs)
    out, lo = [], 0
    while lo < len(starts):
        first = int(starts[lo])
        hi = max(int(np.searchsorted(seg_end, first + chunk, side="right")), lo + 1)
        out.append((lo, hi, first, int(seg_end[hi - 1])))
        lo = hi
    return out


def hazard_from_pairs(ln_levels, ln_median, sigma, pair_rate, starts, sites_with_pairs, n_sites,
                      truncation_sigma=None, chunk=None):
    r"""Hazard curves [1/yr] of ``n_sites`` sites from per-pair ground-motion parameters.

    Parameters
    ----------
    ln_levels : ndarray, shape (n_levels,) [ln g]
    ln_median, sigma : ndarray, shape (n_pairs,) [ln g], [ln units]
        Sorted by site (see :func:`pair_index`).
    pair_rate : ndarray, shape (n_pairs,) [1/yr]
        Annual rate of each pair's rupture.
    starts, sites_with_pairs : ndarray of int
        Segments from :func:`pair_index`.
    n_sites : int
    truncation_sigma : float or None
    chunk : int or None
        Pairs evaluated per vectorised pass (whole sites; default :data:`CHUNK_VALUES`
        values per pass).  Results do not depend on it.

    Returns
    -------
    ndarray, shape (n_sites, n_levels) [1/yr]

    Notes
    -----
    :math:`\lambda_s(x) = \sum_{r} \nu_r P(IM > x \mid r, s)` (Cornell 1968, discretised).
    """
    n_lev = len(ln_levels)
    out = np.zeros((n_sites, n_lev))
    n_pairs = len(ln_median)
    if n_pairs == 0:
        return out
    chunk = max(1, CHUNK_VALUES // n_lev) if chunk is None else chunk
    passes = site_chunks(starts, n_pairs, chunk)
    work = np.empty((max(last - first for _, _, first, last in passes), n_lev))
    scratch = np.empty(work.shape[::-1])
    bounds = np.append(starts, n_pairs)
    # whole sites per pass so each site's sum is complete; the rate-weighted sum over each
    # site's pairs is one sparse (sites x pairs) product, a single pass in C
    for lo, hi, first, last in passes:
        p = exceedance_probability(ln_levels, ln_median[first:last], sigma[first:last], truncation_sigma,
                                   out=work[:last - first], scratch=scratch)
        weights = sp.csr_matrix((pair_rate[first:last], np.arange(last - first), bounds[lo:hi + 1] - first),
                                shape=(hi - lo, last - first))
        out[sites_with_pairs[lo:hi]] = weights @ p
    return out


def weighted_mean(curves, weights):
    """Weighted mean over the leading (branch) axis; weights must sum to 1 (1e-9).

    Parameters
    ----------
    curves : ndarray, shape (n_branches, ...)
    weights : array_like, shape (n_branches,) [-]

    Returns
    -------
    ndarray, shape curves.shape[1:]
        Logic-tree mean (common practice), :func:`weighted_sum` of the checked weights.
    """
    w = _check_weights(weights, curves.shape[0])
    return weighted_sum(curves, w)


def weighted_sum(curves, weights):
    r"""Weighted sum over the leading (branch) axis, :math:`\sum_b w_b c_b`, weights as given.

    Parameters
    ----------
    curves : ndarray, shape (n_branches, ...)
        E.g. hazard curves [1/yr] of each ground-motion branch.
    weights : array_like, shape (n_branches,) [-]
        Branch weights (not re-checked: callers pass validated logic-tree weights).

    Returns
    -------
    ndarray, shape curves.shape[1:]
        The logic-tree mean when the weights sum to 1 (common practice).
    """
    return np.tensordot(np.asarray(weights, dtype=float), curves, axes=(0, 0))


def weighted_fractiles(curves, weights, quantiles):
    r"""Weighted quantiles over the leading (branch) axis, element by element.

    The q-fractile is the smallest branch value whose cumulative weight (branches
    sorted by value) reaches q: the inverse of the weighted empirical distribution
    (common practice for logic-tree fractile hazard curves).  Applied level by level
    to non-increasing curves it gives non-increasing curves.

    Returns
    -------
    ndarray, shape (n_quantiles,) + curves.shape[1:]
    """
    w = _check_weights(weights, curves.shape[0])
    q = np.asarray(quantiles, dtype=float)
    if np.any((q <= 0) | (q >= 1)):
        raise ValueError(f"quantiles must lie in (0, 1), got {q.tolist()}")
    order = np.argsort(curves, axis=0, kind="stable")
    sorted_vals = np.take_along_axis(curves, order, axis=0)
    cum = np.cumsum(w[order], axis=0)
    out = []
    for qi in q:
        k = np.argmax(cum >= qi - 1e-12, axis=0)
        out.append(np.take_along_axis(sorted_vals, k[None], axis=0)[0])
    return np.stack(out)


def _check_weights(weights, n):
    w = np.asarray(weights, dtype=float)
    if w.shape != (n,):
        raise ValueError(f"expected {n} branch weights, got shape {w.shape}")
    if np.any(w < 0) or abs(w.sum() - 1.0) > 1e-9:
        raise ValueError(f"branch weights must be non-negative and sum to 1, got {w.tolist()} (sum {w.sum():.12g})")
    return w


@dataclass(frozen=True)
class DisaggBins:
    """Bin edges for magnitude [Mw], distance [km] (Rrup) and epsilon [-]."""

    mag_edges: np.ndarray
    dist_edges: np.ndarray
    eps_edges: np.ndarray

    @classmethod
    def default(cls):
        return cls(np.arange(4.0, 9.01, 0.5), np.array([0, 10, 20, 30, 50, 75, 100, 150, 200, 300, 500.0]),
                   np.array([-np.inf, -2, -1, -0.5, 0, 0.5, 1, 2, np.inf]))

    @property
    def shape(self):
        return (len(self.mag_edges) - 1, len(self.dist_edges) - 1, len(self.eps_edges) - 1)


#: Columns of the disaggregation moments (last axis), each summed over (site, rupture) pairs
#: with the pair's contribution :math:`w = \nu_r P(IM > x^* \mid r)` [1/yr]: the rate, the
#: rate-weighted magnitude [Mw/yr], Rrup [km/yr], the rate of pairs with a finite epsilon
#: and their rate-weighted epsilon [1/yr].
DISAGG_MOMENTS = ("rate", "rate_mag", "rate_dist_km", "rate_eps_finite", "rate_eps")


def disaggregation_from_pairs(ln_targets, ln_median, sigma, pair_rate, pair_site, mag, dist_km, bins, n_sites,
                              truncation_sigma=None, *, moments=False):
    r"""Exceedance-rate contributions by (M, R, epsilon) bin at target levels.

    Parameters
    ----------
    ln_targets : ndarray, shape (n_sites, n_targets) [ln g]
        Target levels per site (e.g. the uniform-hazard values); NaN skips a target.
    ln_median, sigma, pair_rate, pair_site, mag, dist_km : ndarray, shape (n_pairs,)
    bins : DisaggBins
    n_sites : int
    truncation_sigma : float or None
    moments : bool
        Also return the exact rate-weighted sums (:data:`DISAGG_MOMENTS`).

    Returns
    -------
    contrib : ndarray, shape (n_sites, n_targets, n_mag, n_dist, n_eps) [1/yr]
        Each pair contributes :math:`w = \nu_r P(IM > x^* \mid r)` to the bin of its
        magnitude, distance and :math:`\varepsilon^* = (\ln x^* - \mu_r)/\sigma_r`, the
        epsilon needed to reach the target (Bazzurro & Cornell 1999); pairs outside the
        magnitude or distance edges go to the nearest end bin.
    moments : ndarray, shape (n_sites, n_targets, 5), if ``moments``
        :math:`\sum w`, :math:`\sum w M`, :math:`\sum w R`, and over the pairs with a
        finite :math:`\varepsilon^*` (nonzero sigma) :math:`\sum w` and
        :math:`\sum w \varepsilon^*`; :func:`disaggregation_means` turns them into the
        exact means.

    Notes
    -----
    Vectorised over pairs: one segmented sum (``np.bincount``) per target level.  Pairs
    whose weight is exactly 0 at a target are left out of its sums (beyond the
    truncation at the site's lowest target already, :func:`_possible_pairs`, or at that
    target): they would add only zeros, so every sum keeps its bits.
    """
    n_t = ln_targets.shape[1]
    nm, nr, ne = bins.shape
    out = np.zeros((n_sites, n_t, nm, nr, ne))
    mom = np.zeros((n_sites, n_t, len(DISAGG_MOMENTS)))
    if len(ln_median) == 0:
        return (out, mom) if moments else out
    im = np.clip(np.searchsorted(bins.mag_edges, mag, side="right") - 1, 0, nm - 1)
    ir = np.clip(np.searchsorted(bins.dist_edges, dist_km, side="right") - 1, 0, nr - 1)
    base = (im * nr + ir) * ne
    out_flat = out.reshape(-1)  # a view: out is contiguous
    mom_rows = mom.reshape(-1, len(DISAGG_MOMENTS))  # a view: (site, target) rows
    pairs = _possible_pairs(ln_targets, ln_median, sigma, pair_rate, pair_site, truncation_sigma)
    if pairs is not None:
        ln_median, sigma, pair_rate, pair_site, base = (a[pairs] for a in (ln_median, sigma, pair_rate, pair_site,
                                                                              base))
        mag, dist_km = mag[pairs], dist_km[pairs]
    for t in range(n_t):
        target = ln_targets[pair_site, t]
        ok = np.isfinite(target)
        if not ok.any():
            continue
        ok = np.flatnonzero(ok)
        mu, sd = ln_median[ok], sigma[ok]
        tgt = target[ok]
        w = exceedance_probability(np.zeros(1), mu - tgt, sd, truncation_sigma)[:, 0]
        w *= pair_rate[ok]
        # pairs of weight exactly 0 (beyond the truncation, or of zero rate) add +0.0 or -0.0
        # to sums that start at +0.0: leaving them out changes no bit of any sum
        some = np.flatnonzero(w != 0)  # NaN kept
        if some.size < ok.size:
            ok, mu, sd, tgt, w = ok[some], mu[some], sd[some], tgt[some], w[some]
        with np.errstate(divide="ignore", invalid="ignore"):
            eps = np.where(sd > 0, (tgt - mu) / sd, np.sign(tgt - mu) * np.inf)
        ie = np.clip(np.searchsorted(bins.eps_edges, eps, side="right") - 1, 0, ne - 1)
        row = pair_site[ok] * n_t + t
        cell = row * (nm * nr * ne) + base[ok] + ie
        out_flat += np.bincount(cell, weights=w, minlength=out_flat.size)
        if moments:
            finite = np.isfinite(eps)
            w_eps = np.where(finite, w, 0.0)
            for c, weights in enumerate((w, w * mag[ok], w * dist_km[ok], w_eps,
                                         w_eps * np.where(finite, eps, 0.0))):
                mom_rows[:, c] += np.bincount(row, weights=weights, minlength=mom_rows.shape[0])
    return (out, mom) if moments else out


def _possible_pairs(ln_targets, ln_median, sigma, pair_rate, pair_site, truncation_sigma):
    """Pairs that may have a nonzero weight at some target (None: all of them), in their order.

    A pair whose standardised value at its site's lowest target, computed as
    :func:`exceedance_probability` computes it, lies below the truncation window
    (:func:`truncation_window`) has a weight of exactly 0 at every target (the value only
    decreases as the target rises: rounding is monotone), as has a pair of zero rate;
    leaving them out changes no bit of any sum.
    """
    if truncation_sigma is None:
        return None
    with np.errstate(invalid="ignore", all="ignore"):
        lowest = np.nanmin(np.where(np.isfinite(ln_targets), ln_targets, np.inf), axis=1)[pair_site]
        z = np.subtract(ln_median - lowest, 0.0)
        z *= 1.0 / sigma
    lo, _ = truncation_window(truncation_sigma)
    keep = ~(z < lo) & (pair_rate != 0)
    return None if keep.all() else np.flatnonzero(keep)


def disaggregation_means(moments):
    r"""Exact mean magnitude [Mw], distance [km] and epsilon [-] from disaggregation moments.

    Parameters
    ----------
    moments : ndarray, shape (..., 5)
        Rate-weighted sums (:data:`DISAGG_MOMENTS`), e.g. from
        :func:`disaggregation_from_pairs`, summed over ruptures and logic-tree branches
        with their weights.

    Returns
    -------
    mean_m, mean_r, mean_eps : ndarray, shape (...)
        :math:`\bar M = \sum w M / \sum w` (likewise :math:`\bar R`;
        :math:`\bar\varepsilon` over the pairs with a finite epsilon), with
        :math:`w = \nu_r P(IM > x^* \mid r)`: the means of the disaggregation
        distribution of the model itself (Bazzurro & Cornell 1999), NaN where nothing
        contributes.
    """
    m = np.asarray(moments, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_m = np.where(m[..., 0] > 0, m[..., 1] / m[..., 0], np.nan)
        mean_r = np.where(m[..., 0] > 0, m[..., 2] / m[..., 0], np.nan)
        mean_e = np.where(m[..., 3] > 0, m[..., 4] / m[..., 3], np.nan)
    return mean_m, mean_r, mean_e


def disaggregation_summary(contrib, bins, moments=None):
    r"""Shares, mean and modal (M, R, epsilon) from binned contributions.

    Parameters
    ----------
    contrib : ndarray, shape (..., n_mag, n_dist, n_eps) [1/yr]
    bins : DisaggBins
    moments : ndarray, shape (..., 5), optional
        Exact rate-weighted sums (:func:`disaggregation_from_pairs` with ``moments=True``).

    Returns
    -------
    shares : ndarray, same shape, summing to 1 over the last three axes (0 where the
        total is 0)
    mean_m, mean_r, mean_eps, mode_m, mode_r, mode_eps : ndarray, shape (...)
        Means: exact (:func:`disaggregation_means`) when ``moments`` are given, else from
        bin centres (open-ended epsilon bins are taken 0.5 wide), an approximation that
        converges to the exact means as the bins get finer.  Modes are the centres of
        the single most contributing (M, R, epsilon) cell.  Epsilon is the one needed to
        reach the target level, :math:`(\ln x^* - \mu_{\ln Y})/\sigma_{\ln Y}`.
    """
    total = contrib.sum(axis=(-3, -2, -1), keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        shares = np.where(total > 0, contrib / total, 0.0)
    mc = 0.5 * (bins.mag_edges[:-1] + bins.mag_edges[1:])
    rc = 0.5 * (bins.dist_edges[:-1] + bins.dist_edges[1:])
    e = bins.eps_edges.copy()
    e[0] = e[1] - 0.5 if np.isinf(e[0]) else e[0]
    e[-1] = e[-2] + 0.5 if np.isinf(e[-1]) else e[-1]
    ec = 0.5 * (e[:-1] + e[1:])
    if moments is None:
        mean_m = np.einsum("...ijk,i->...", shares, mc)
        mean_r = np.einsum("...ijk,j->...", shares, rc)
        mean_e = np.einsum("...ijk,k->...", shares, ec)
    else:
        mean_m, mean_r, mean_e = disaggregation_means(moments)
    flat = shares.reshape(shares.shape[:-3] + (-1,))
    idx = np.argmax(flat, axis=-1)
    i, j, k = np.unravel_index(idx, shares.shape[-3:])
    empty = total[..., 0, 0, 0] <= 0
    nan = lambda a: np.where(empty, np.nan, a)
    return shares, nan(mean_m), nan(mean_r), nan(mean_e), nan(mc[i]), nan(rc[j]), nan(ec[k])


def uniform_hazard_targets(levels, curves, return_periods_yr):
    """ln of the IM at each return period per site (NaN outside the curve) [ln g]."""
    x = im_at_rate(1.0 / np.asarray(return_periods_yr, dtype=float), levels, curves)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.log(x)


# --- engine driver: sources + ground-motion models -> curves --------------------------------

def compute_site_hazard(site_lon, site_lat, site_vs30, ruptures, gmms, ims, levels_g, *, truncation_sigma=None,
                        max_distance_km=200.0, region="global", site_block=64, ref=None, region_branches=None,
                        site_fields=None, memo=None, memo_key=None, by_region=False):
    r"""Hazard curves [1/yr] from a rupture set and ground-motion models.

    Parameters
    ----------
    site_lon, site_lat : array_like, shape (n_sites,) [deg]
    site_vs30 : array_like, shape (n_sites,) [m/s]
        Each model takes it clamped to its own range (:func:`quakefolio.core.pairs.model_input`).
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    gmms : sequence of ground-motion models (``quakefolio.core.gmm``)
        The branches of the active-crustal ruptures, evaluated on the same pairs
        (distances are computed once per block).
    ims : sequence of str
    levels_g : array_like, shape (n_levels,) [g], strictly increasing
    truncation_sigma : float or None
    max_distance_km : float
        Integration distance on Rjb [km]: pairs beyond it contribute nothing.
    region : str
        Region passed to the models.
    site_block : int
        Sites per vectorised block (bounds memory to block x ruptures x levels).
    ref : (lon, lat) or None
        Reference point of the local projection (default: mean site position), fixed
        for all blocks so results do not depend on the blocking.
    region_branches : mapping of str to sequence of (weight, model), or None
        Ground-motion branches of the other tectonic regions present in ``ruptures``
        (:func:`quakefolio.core.pairs.region_parts`).
    site_fields : dict of str to array_like, shape (n_sites,), or None
        Optional per-site inputs: ``backarc`` (0 or 1), ``z1p0_km``, ``z2p5_km`` [km]
        (NaN: the model's own default), :func:`quakefolio.core.pairs.pair_blocks`.
    memo, memo_key : optional
        Keeps each model's per-pair values (:func:`quakefolio.core.pairs.model_values`)
        under ``(memo_key, region part, first site of the block, model index, model name,
        ims)``, for :func:`compute_disaggregation` and
        :func:`quakefolio.core.cms.compute_spectrum_sums` on the same sites with the same
        ``memo_key``; ``memo_key`` must identify the sites, ruptures and models.
    by_region : bool
        Return each region's curves per model instead (:mod:`quakefolio.core.combinations`).

    Returns
    -------
    ndarray, shape (n_gmms, n_ims, n_sites, n_levels) [1/yr]
        Branch ``g``: the active-crustal ruptures' curve with model ``g`` plus, for every
        other region, the weighted mean of its branches' curves.  With ``by_region``: a
        dict of region name to its curves, shape (n_models, n_ims, n_sites, n_levels).

    Notes
    -----
    :math:`\lambda(IM > x) = \sum_r \nu_r P(IM > x \mid r)` over ruptures within the
    integration distance (Cornell 1968, discretised); see :func:`hazard_from_pairs`.
    Regions are independent parts of the sum: a branch combination (one model per
    region) has the hazard :math:`\sum_R \lambda_R^{(g_R)}`, so its logic-tree mean over
    all combinations (weights the product of the regions' weights) is
    :math:`\sum_R \sum_g w_{R,g} \lambda_R^{(g)}`, exactly the weighted mean over the
    returned branches with the active-crustal weights.  Fractiles are taken over every
    combination instead (:func:`quakefolio.core.combinations.combination_fractiles`).
    """
    lnx = np.log(np.asarray(levels_g, dtype=float))
    if np.any(np.diff(lnx) <= 0):
        raise ValueError("levels_g must be strictly increasing")
    out, by_part = np.zeros((len(gmms), len(ims), len(site_lon), len(lnx))), {}
    for k, (part, branches) in enumerate(region_parts(ruptures, region_branches)):
        models = gmms if branches is None else [m for _, m in branches]
        curves = _part_hazard(site_lon, site_lat, site_vs30, part, models, ims, lnx, truncation_sigma,
                              max_distance_km, region, site_block, ref, site_fields, memo, (memo_key, k))
        by_part["active_crustal" if branches is None else part.regions[0]] = curves
        if branches is None:
            out += curves
        else:
            out += weighted_sum(curves, [w for w, _ in branches])[None]
    return by_part if by_region else out


def _part_hazard(site_lon, site_lat, site_vs30, ruptures, gmms, ims, lnx, truncation_sigma, max_distance_km, region,
                 site_block, ref, site_fields, memo, part_key):
    """Curves (n_gmms, n_ims, n_sites, n_levels) [1/yr] of one region's ruptures, one per model."""
    out = np.zeros((len(gmms), len(ims), len(site_lon), len(lnx)))
    for blk, site, rup, starts, owners, inp, cells, _, rate in pair_blocks(
            site_lon, site_lat, site_vs30, ruptures, max_distance_km, region, site_block, ref, site_fields):
        n_blk = blk.stop - blk.start
        for g, gmm in enumerate(gmms):
            ln_median, sigma = model_values(gmm, inp, cells, ims, memo,
                                            values_key(part_key, blk.start, g, gmm, ims))
            for i in range(len(ims)):
                out[g, i, blk] = hazard_from_pairs(lnx, ln_median[i], sigma[i], rate, starts, owners, n_blk,
                                                   truncation_sigma)
    return out


def compute_disaggregation(site_lon, site_lat, site_vs30, ruptures, gmms, gmm_weights, ims, ln_targets, bins, *,
                           truncation_sigma=None, max_distance_km=200.0, region="global", site_block=64, ref=None,
                           moments=False, region_branches=None, site_fields=None, memo=None, memo_key=None):
    r"""Weighted (M, R, epsilon) contributions [1/yr] at target levels per site and IM.

    Parameters
    ----------
    ln_targets : ndarray, shape (n_ims, n_sites, n_targets) [ln g]
        E.g. the uniform-hazard values of the mean curve (NaN skips a target).
    gmm_weights : sequence of float
        Weights of ``gmms`` (contributions are summed with these weights).
    Others as :func:`compute_site_hazard`.

    moments : bool
        Also return the weighted exact moments (:data:`DISAGG_MOMENTS`).
    memo, memo_key : optional
        The models' per-pair values kept by :func:`compute_site_hazard` for the same sites
        and ``ims`` are taken from ``memo`` rather than evaluated again (the same arrays).

    Returns
    -------
    contrib : ndarray, shape (n_ims, n_sites, n_targets, n_mag, n_dist, n_eps) [1/yr]
        Distance is Rrup. See :func:`disaggregation_from_pairs` (Bazzurro & Cornell 1999).
        The ruptures of other regions contribute with their branch weights times the
        sum of ``gmm_weights`` (the mean over branch combinations, as the mean curve).
    moments : ndarray, shape (n_ims, n_sites, n_targets, 5), if ``moments``
        Rate-weighted sums over every (site, rupture) pair and model, with the model
        weights (:func:`disaggregation_means` gives the exact means).
    """
    n_t = ln_targets.shape[-1]
    out = np.zeros((len(ims), len(site_lon), n_t) + bins.shape)
    mom = np.zeros((len(ims), len(site_lon), n_t, len(DISAGG_MOMENTS)))
    scale = float(np.sum(gmm_weights))
    for k, (part, branches) in enumerate(region_parts(ruptures, region_branches)):
        weighted = (list(zip(gmms, gmm_weights)) if branches is None
                    else [(m, scale * w) for w, m in branches])
        for blk, site, rup, starts, owners, inp, cells, d, rate in pair_blocks(
                site_lon, site_lat, site_vs30, part, max_distance_km, region, site_block, ref, site_fields):
            n_blk = blk.stop - blk.start
            for g, (gmm, w) in enumerate(weighted):
                ln_median, sigma = model_values(gmm, inp, cells, ims, memo,
                                                values_key((memo_key, k), blk.start, g, gmm, ims))
                for i in range(len(ims)):
                    c, m = disaggregation_from_pairs(
                        ln_targets[i, blk], ln_median[i], sigma[i], rate, site, part.mag[rup], d["rrup_km"],
                        bins, n_blk, truncation_sigma, moments=True)
                    out[i, blk] += w * c
                    mom[i, blk] += w * m
    return (out, mom) if moments else out


def values_key(part_key, first_site, model_index, gmm, ims):
    """Key of one model's per-pair values in a memo (:func:`quakefolio.core.pairs.model_values`).

    Parameters
    ----------
    part_key : (hashable, int)
        The caller's key of the sites, ruptures and models, and the region part
        (:func:`quakefolio.core.pairs.region_parts` order).
    first_site : int
        First site of the block of pairs.
    model_index : int
        The model's place among the part's models.
    gmm : ground-motion model
    ims : sequence of str

    Returns
    -------
    tuple
    """
    return part_key + (first_site, model_index, getattr(gmm, "name", type(gmm).__qualname__), tuple(ims))


# --- event-based ground motion: the same pairs and GMM inputs as the classical engine ----------

def rupture_ground_motion(site_lon, site_lat, site_vs30, ruptures, gmms, ims, *, max_distance_km=200.0,
                          region="global", ref, evaluate=None, site_fields=None):
    r"""Ln median [ln g], tau and phi [ln units] of every (model, IM, site, rupture).

    The (site, rupture) pairs within the integration distance and their ground-motion
    model inputs are those of the classical engine (:func:`quakefolio.core.pairs.block_pairs`, as used by
    :func:`compute_site_hazard`), for all sites at once.

    Parameters
    ----------
    site_lon, site_lat : ndarray, shape (n_sites,) [deg]
    site_vs30 : ndarray, shape (n_sites,) [m/s]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
        ``n_ruptures`` ruptures, of any tectonic regions.
    gmms : sequence of ground-motion models
    ims : sequence of str
    max_distance_km : float
        Integration distance on Rjb [km].
    region : str
    ref : (lon, lat) [deg]
        Reference point of the local projection.
    evaluate : array_like of int, mapping of int to array_like of int, or None
        Indices of the models to evaluate (default: all), for every rupture or, as a
        mapping, per tectonic region code of the ruptures (a code not in it: none); the
        others keep the values of pairs beyond the integration distance.
    site_fields : dict of str to ndarray, shape (n_sites,), or None
        Per-site ``z1p0_km``, ``z2p5_km`` [km] (NaN: the model's own Vs30 relation) and
        ``backarc`` (0 or 1), as :func:`compute_site_hazard`.

    Returns
    -------
    ln_median, tau, phi : ndarray, shape (n_gmms, n_ims, n_sites, n_ruptures)
        ``-inf`` median and zero tau and phi for pairs beyond the integration distance
        (the ground motion there is taken as nil).

    Raises
    ------
    ValueError
        If a model to evaluate gives only a total sigma (``has_tau_phi`` False), or is
        not made for the tectonic region of a rupture it is to evaluate.
    """
    from quakefolio.core.gmm import TECTONIC_REGIONS

    n_im = len(ims)
    mu = np.full((len(gmms), n_im, len(site_lon), len(ruptures.mag)), -np.inf)
    tau = np.zeros_like(mu)
    phi = np.zeros_like(mu)
    fields = {k: np.asarray(v, dtype=float) for k, v in (site_fields or {}).items() if v is not None}
    codes = ruptures.region_code
    for code in np.unique(codes):
        wanted = range(len(gmms)) if evaluate is None else (
            evaluate.get(int(code), ()) if isinstance(evaluate, dict) else evaluate)
        wanted = [int(g) for g in wanted]
        if not wanted:
            continue
        for g in wanted:
            check_event_model(gmms[g], TECTONIC_REGIONS[code])
        idx = np.flatnonzero(codes == code)
        part = ruptures if idx.size == codes.size else ruptures.subset(idx)
        si, ri, _, _, inp, _ = block_pairs(site_lon, site_lat, site_vs30, part, max_distance_km, ref, region,
                                           **fields)
        if inp is None:
            continue
        for g in wanted:
            res = gmms[g].evaluate(model_input(inp, gmms[g]), ims)
            mu[g][:, si, idx[ri]] = res.ln_median
            tau[g][:, si, idx[ri]] = res.tau
            phi[g][:, si, idx[ri]] = res.phi
    return mu, tau, phi
