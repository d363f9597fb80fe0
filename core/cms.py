r"""Conditional mean spectrum (CMS) and its conditional standard deviation.

Given that the ground motion of a record reaches the uniform-hazard target
:math:`\ln Sa^*` at the conditioning period :math:`T^*`, the ln spectral acceleration
at another period :math:`T` is normal with (Baker 2011, Eqs. 1-4; equation numbers
from memory)

.. math::
    \varepsilon^* &= \frac{\ln Sa^* - \mu_{\ln Sa}(T^*)}{\sigma_{\ln Sa}(T^*)} \\
    \mu_{\ln Sa(T) \mid \ln Sa(T^*)} &= \mu_{\ln Sa}(T) + \rho(T, T^*)\,\varepsilon^*\,\sigma_{\ln Sa}(T) \\
    \sigma_{\ln Sa(T) \mid \ln Sa(T^*)} &= \sigma_{\ln Sa}(T)\sqrt{1 - \rho(T, T^*)^2}

the conditional mean and standard deviation of a bivariate normal pair
(e.g. Benjamin & Cornell 1970, Sec. 3.6), with :math:`\mu` and :math:`\sigma` the
ground-motion model's ln median and total standard deviation for the causal scenario and
:math:`\rho` the correlation of the residuals at the two periods, Baker & Jayaram (2008)
(:func:`quakefolio.core.events.gmf.cross_im_correlation_matrix`).  The CMS is
:math:`\exp(\mu_{\ln Sa(T) \mid \ln Sa(T^*)})`: it passes through the target at
:math:`T^*` (where :math:`\rho = 1`), with zero conditional standard deviation there.

**The causal scenario is the mean disaggregation.**  The hazard at the target is
disaggregated over every (site, rupture) pair and ground-motion branch with the
weights :math:`w = v_b\,\nu_r\,P_b(Sa(T^*) > Sa^* \mid r)` of the disaggregation
(:func:`quakefolio.core.hazard.disaggregation_from_pairs`; :math:`v_b` the logic-tree
weight of the branch combination, :math:`\nu_r` the rupture rate).  The mean magnitude
:math:`\bar M`, distance :math:`\bar R` and epsilon :math:`\bar\varepsilon` are the
exact weighted means (Bazzurro & Cornell 1999).  The scenario's ln median and sigma at
every period are the same weighted means of the values the models give for each pair,

.. math:: \bar\mu(T) = \frac{\sum w\,\mu_{b,r}(T)}{\sum w},\qquad
          \bar\sigma(T) = \frac{\sum w\,\sigma_{b,r}(T)}{\sum w},

rather than one model evaluated at :math:`(\bar M, \bar R)`, which would need an
invented rupture geometry (Ztor, dip, rake, width, Rx, hanging wall).  A ground-motion
branch thus enters in proportion to its share of the hazard at the target, as it does
in :math:`\bar M`.  :math:`\varepsilon^*` follows from the target and this scenario
(the first equation), so the spectrum passes through the target.  It equals the
disaggregation's :math:`\bar\varepsilon` when every contributing pair has the same
sigma at :math:`T^*` (in particular for one scenario); in general they differ by
:math:`\mathrm{cov}_w(\varepsilon, \sigma(T^*)) / \bar\sigma(T^*)`, and both are reported.
For a single rupture and model the whole construction is Baker (2011) exactly.
Residual truncation shapes the weights only; the conditional distribution is the
untruncated one.

Periods: the spectral periods every ground-motion branch tabulates (so no model is
interpolated in period), within the 0.01-10 s range of the correlation model, plus the
conditioning IMs (:func:`spectrum_ims`).

References
----------
Baker, J. W. (2011). Conditional mean spectrum: tool for ground-motion selection.
J. Struct. Eng. 137(3), 322-331.
Baker, J. W., Jayaram, N. (2008). Correlation of spectral acceleration values from NGA
ground motion models. Earthquake Spectra 24(1), 299-317.
Bazzurro, P., Cornell, C. A. (1999). Disaggregation of seismic hazard. BSSA 89(2), 501-520.
Benjamin, J. R., Cornell, C. A. (1970). Probability, Statistics, and Decision for Civil
Engineers. McGraw-Hill.
"""
from __future__ import annotations

from dataclasses import fields
from typing import NamedTuple

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.events.gmf import cross_im_correlation_matrix
from quakefolio.core.hazard import (
    DISAGG_MOMENTS, DisaggBins, disaggregation_from_pairs, disaggregation_means, exceedance_probability, values_key,
)
from quakefolio.core.pairs import block_pairs, model_input, region_parts
from quakefolio.core.sources.geometry import mean_position
from quakefolio.core.ims import model_period, parse_im

sp = lazy_module("scipy.sparse")

__all__ = [
    "CMS_MIN_PERIOD_S",
    "CMS_MAX_PERIOD_S",
    "SPECTRUM_SUMS",
    "spectrum_ims",
    "conditional_mean_spectrum",
    "spectrum_sums_from_pairs",
    "compute_spectrum_sums",
    "CausalSpectrum",
    "spectrum_from_sums",
]

#: Period range [s] of the Baker & Jayaram (2008) correlation equation (PGA counts as 0.01 s).
CMS_MIN_PERIOD_S, CMS_MAX_PERIOD_S = 0.01, 10.0
#: Columns of the spectral sums (second-to-last axis): :math:`\sum w\mu(T)` [ln g / yr] and
#: :math:`\sum w\sigma(T)` [1/yr], with the disaggregation weights :math:`w` [1/yr].
SPECTRUM_SUMS = ("rate_ln_median", "rate_sigma")
#: One bin holding every pair: only the exact moments of the disaggregation are wanted.
_ONE_BIN = DisaggBins(np.array([-np.inf, np.inf]), np.array([-np.inf, np.inf]), np.array([-np.inf, np.inf]))
#: Pairs x periods evaluated at once (bounds the model's arrays to about 16 MB each).
_CHUNK_VALUES = 2_000_000


def spectrum_ims(gmms, conditioning_ims=()):
    """IMs of the spectrum: periods every model tabulates, within the correlation model's range.

    Parameters
    ----------
    gmms : sequence of ground-motion models
        With ``tabulated_periods_s`` [s] (:class:`quakefolio.core.gmm.VectorGmm`).
    conditioning_ims : sequence of str
        Added to the spectrum (``PGA`` too), whatever the tables.

    Returns
    -------
    list of str
        Canonical names (:func:`quakefolio.core.ims.parse_im`), PGA first, then by period.

    Notes
    -----
    Periods in [:data:`CMS_MIN_PERIOD_S`, :data:`CMS_MAX_PERIOD_S`], the range of the
    Baker & Jayaram (2008) equation; the intersection of the models' tables, so that every
    branch is evaluated at its own coefficients (no interpolation in period).
    """
    common = None
    for g in gmms:
        periods = {float(p) for p in g.tabulated_periods_s if CMS_MIN_PERIOD_S <= p <= CMS_MAX_PERIOD_S}
        common = periods if common is None else common & periods
    names = {parse_im(f"SA_{p:g}") for p in (common or ())} | {parse_im(im) for im in conditioning_ims}
    return sorted(names, key=model_period)


def conditional_mean_spectrum(ln_target, ln_median, sigma, rho, conditioning):
    r"""Conditional mean [ln g] and standard deviation [ln units] of ln Sa given the target at T*.

    Parameters
    ----------
    ln_target : array_like, shape S [ln g]
        Target :math:`\ln Sa^*` at the conditioning period (e.g. the uniform-hazard value).
    ln_median : array_like, shape S + (n_periods,) [ln g]
        Scenario ln median :math:`\mu_{\ln Sa}(T)` at every period of the spectrum.
    sigma : array_like, shape S + (n_periods,) [ln units], > 0 at the conditioning period
        Scenario total standard deviation :math:`\sigma_{\ln Sa}(T)`.
    rho : array_like, shape (n_periods,) [-], in [-1, 1]
        Correlation of the residuals at each period with the conditioning one (1 there).
    conditioning : int
        Index of the conditioning period along the last axis.

    Returns
    -------
    eps : ndarray, shape S [-]
        :math:`\varepsilon^* = (\ln Sa^* - \mu(T^*))/\sigma(T^*)`.
    ln_cms : ndarray, shape S + (n_periods,) [ln g]
        :math:`\mu(T) + \rho\,\varepsilon^*\sigma(T)`; :math:`\ln Sa^*` at the conditioning
        period (to round-off).
    conditional_sigma : ndarray, shape S + (n_periods,) [ln units]
        :math:`\sigma(T)\sqrt{1 - \rho^2}`; exactly 0 at the conditioning period.

    Notes
    -----
    Baker (2011), Eqs. 1-4 (equation numbers from memory); the conditional moments of a
    bivariate normal pair (Benjamin & Cornell 1970). NaN inputs give NaN outputs.
    """
    mu = np.asarray(ln_median, dtype=float)
    sd = np.asarray(sigma, dtype=float)
    r = np.asarray(rho, dtype=float)
    if r.ndim != 1 or r.shape[0] != mu.shape[-1] or sd.shape != mu.shape:
        raise ValueError(f"rho must have shape (n_periods,) matching ln_median {mu.shape} and sigma {sd.shape}; "
                         f"got {r.shape}")
    if np.any(np.abs(r) > 1) or r[conditioning] != 1.0:
        raise ValueError(f"rho must lie in [-1, 1] and equal 1 at the conditioning period; got {r.tolist()}")
    if np.any(sd < 0):
        raise ValueError("sigma must be non-negative")
    with np.errstate(divide="ignore", invalid="ignore"):
        eps = (np.asarray(ln_target, dtype=float) - mu[..., conditioning]) / sd[..., conditioning]
    ln_cms = mu + r * eps[..., None] * sd
    conditional_sigma = sd * np.sqrt(1.0 - r * r)
    return eps, ln_cms, conditional_sigma


def _per_pair_blocks(site_lon, site_lat, site_vs30, ruptures, max_distance_km, region, site_block, ref,
                     site_fields=None):
    """Blocks of sites with their surviving (site, rupture) pairs and one GMM scenario per pair.

    The pairs and inputs of the classical engine (:func:`quakefolio.core.pairs.block_pairs`,
    with the per-site ``site_fields``: ``z1p0_km``, ``z2p5_km`` [km], ``backarc``),
    with the projection's reference point fixed for all blocks (default: the mean site
    position), so results do not depend on the blocking.  Yields
    ``(slice, site, rupture, inp, distances, pair_rate)``; blocks without pairs are skipped.
    """
    lon = np.asarray(site_lon, dtype=float)
    lat = np.asarray(site_lat, dtype=float)
    vs30 = np.asarray(site_vs30, dtype=float)
    ref = ref if ref is not None else mean_position(lon, lat)
    fields = {k: np.asarray(v, dtype=float) for k, v in (site_fields or {}).items() if v is not None}
    for lo in range(0, len(lon), site_block):
        blk = slice(lo, min(len(lon), lo + site_block))
        site, rup, _, _, inp, d = block_pairs(lon[blk], lat[blk], vs30[blk], ruptures, max_distance_km, ref, region,
                                              **{k: v[blk] for k, v in fields.items()})
        if site.size:
            yield blk, site, rup, inp, d, ruptures.rate[rup]


def spectrum_sums_from_pairs(ln_targets, ln_median_cond, sigma_cond, pair_rate, pair_site, mag, dist_km, ln_median,
                             sigma, n_sites, truncation_sigma=None):
    r"""Disaggregation moments at the target and weighted sums of the spectrum, per site and target.

    Parameters
    ----------
    ln_targets : ndarray, shape (n_sites, n_targets) [ln g]
        Targets at the conditioning period (NaN skips a target).
    ln_median_cond, sigma_cond : ndarray, shape (n_pairs,) [ln g], [ln units]
        The model's ln median and sigma at the conditioning period, pairs sorted by site.
    pair_rate, pair_site, mag, dist_km : ndarray, shape (n_pairs,)
        Rupture rate [1/yr], site index, magnitude [Mw] and Rrup [km] of each pair.
    ln_median, sigma : ndarray, shape (n_periods, n_pairs) [ln g], [ln units]
        The model's values at the periods of the spectrum.
    n_sites : int
    truncation_sigma : float or None

    Returns
    -------
    moments : ndarray, shape (n_sites, n_targets, 5)
        :data:`quakefolio.core.hazard.DISAGG_MOMENTS` (from
        :func:`quakefolio.core.hazard.disaggregation_from_pairs`).
    sums : ndarray, shape (n_sites, n_targets, 2, n_periods)
        :math:`\sum w\mu(T)` and :math:`\sum w\sigma(T)` (:data:`SPECTRUM_SUMS`) with the
        same weights :math:`w = \nu_r P(Sa(T^*) > Sa^* \mid r)` [1/yr].

    Notes
    -----
    Bazzurro & Cornell (1999) weights; the sums are one sparse (sites x pairs) product
    per target.
    """
    _, moments = disaggregation_from_pairs(ln_targets, ln_median_cond, sigma_cond, pair_rate, pair_site, mag, dist_km,
                                           _ONE_BIN, n_sites, truncation_sigma, moments=True)
    n_t = ln_targets.shape[1]
    sums = np.zeros((n_sites, n_t, len(SPECTRUM_SUMS), ln_median.shape[0]))
    for t in range(n_t):
        target = ln_targets[pair_site, t]
        ok = np.flatnonzero(np.isfinite(target))
        if ok.size == 0:
            continue
        p = exceedance_probability(np.zeros(1), ln_median_cond[ok] - target[ok], sigma_cond[ok], truncation_sigma)
        w = sp.csr_matrix((pair_rate[ok] * p[:, 0], (pair_site[ok], np.arange(ok.size))), shape=(n_sites, ok.size))
        sums[:, t, 0] = w @ ln_median[:, ok].T
        sums[:, t, 1] = w @ sigma[:, ok].T
    return moments, sums


def _subset(inp, keep):
    """The ground-motion input of the pairs ``keep`` (array fields indexed, the others as they are)."""
    values = {}
    for f in fields(inp):
        v = getattr(inp, f.name)
        values[f.name] = v if v is None or isinstance(v, str) else np.broadcast_to(v, inp.shape)[keep]
    return type(inp)(**values)


def _contributing(ln_targets, ln_median_cond, sigma_cond, rate, site, truncation_sigma):
    """Pairs with a positive weight at some target of some conditioning IM (the others add nothing)."""
    keep = np.zeros(len(site), dtype=bool)
    for c in range(ln_median_cond.shape[0]):
        for t in range(ln_targets.shape[-1]):
            target = ln_targets[c, site, t]
            ok = np.isfinite(target)
            p = exceedance_probability(np.zeros(1), ln_median_cond[c, ok] - target[ok], sigma_cond[c, ok],
                                       truncation_sigma)[:, 0]
            keep[np.flatnonzero(ok)[p > 0]] = True
    return keep & (rate > 0)


def _site_chunks(pairs, pair_site, size):
    """Pairs in chunks of whole sites (a site with more pairs than ``size`` split from its own first pair).

    Each site's sums then run over its own pairs in the same order whatever the other
    sites of the block: results do not depend on the blocking.
    """
    if pairs.size == 0:
        return
    starts = np.flatnonzero(np.r_[True, pair_site[1:] != pair_site[:-1]])
    # allowed cuts: every site start, every size-th pair of a site, the end; consecutive cuts
    # are at most ``size`` apart, so the furthest cut within ``size`` is always beyond ``lo``
    cuts = np.concatenate([np.arange(a, b, size) for a, b in zip(starts, np.r_[starts[1:], pairs.size])]
                          + [[pairs.size]])
    lo = 0
    while lo < pairs.size:
        hi = int(cuts[np.searchsorted(cuts, lo + size, side="right") - 1])
        yield pairs[lo:hi]
        lo = hi


def compute_spectrum_sums(site_lon, site_lat, site_vs30, ruptures, gmms, gmm_weights, conditioning_ims, ims,
                          ln_targets, *, truncation_sigma=None, max_distance_km=200.0, region="global", site_block=64,
                          ref=None, region_branches=None, site_fields=None, memo=None, memo_key=None, curve_ims=None):
    r"""Weighted disaggregation moments and spectral sums [1/yr] per conditioning IM, site and target.

    Parameters
    ----------
    site_lon, site_lat : array_like, shape (n_sites,) [deg]
    site_vs30 : array_like, shape (n_sites,) [m/s]
    ruptures : quakefolio.core.sources.ruptures.RuptureSet
    gmms : sequence of ground-motion models
    gmm_weights : sequence of float
        Weights of ``gmms`` (every sum is taken with these weights).
    conditioning_ims : sequence of str
        The conditioning IMs (``n_cond``).
    ims : sequence of str
        IMs of the spectrum (``n_periods``, e.g. :func:`spectrum_ims`).
    ln_targets : ndarray, shape (n_cond, n_sites, n_targets) [ln g]
        Target at each conditioning IM (NaN skips a target).
    truncation_sigma, max_distance_km, region, site_block, ref, region_branches, site_fields
        As :func:`quakefolio.core.hazard.compute_site_hazard`; ``gmms`` evaluate the
        active-crustal ruptures, each other region's ruptures enter with their branch
        weights times the sum of ``gmm_weights`` (the mean over branch combinations, as
        :func:`quakefolio.core.hazard.compute_disaggregation`).
    memo, memo_key, curve_ims : optional
        The models' per-pair values at ``curve_ims`` (which hold the conditioning IMs) kept
        by :func:`quakefolio.core.hazard.compute_site_hazard` for the same sites and
        ``memo_key``: the values at the conditioning IMs are read from them rather than
        evaluated again (the same numbers: a model gives each IM the same values whatever
        the other IMs of the call, and the same per pair or on a grid).

    Returns
    -------
    moments : ndarray, shape (n_cond, n_sites, n_targets, 5)
        Disaggregation moments (:data:`quakefolio.core.hazard.DISAGG_MOMENTS`).
    sums : ndarray, shape (n_cond, n_sites, n_targets, 2, n_periods)
        :data:`SPECTRUM_SUMS`; :func:`spectrum_from_sums` turns both into the spectrum.

    Notes
    -----
    The (site, rupture) pairs and their model inputs are those of the hazard curves
    (:func:`quakefolio.core.hazard.compute_site_hazard`).  The spectrum is evaluated only
    on the pairs whose weight is positive at some target (the others add exactly
    nothing), a chunk of pairs at a time.
    """
    cond, ims = list(conditioning_ims), list(ims)
    n_t = ln_targets.shape[-1]
    moments = np.zeros((len(cond), len(site_lon), n_t, len(DISAGG_MOMENTS)))
    sums = np.zeros((len(cond), len(site_lon), n_t, len(SPECTRUM_SUMS), len(ims)))
    chunk = max(1, _CHUNK_VALUES // max(1, len(ims)))
    scale = float(np.sum(gmm_weights))
    memo = memo if curve_ims is not None and set(cond) <= set(curve_ims) else None
    for k, (part_set, branches) in enumerate(region_parts(ruptures, region_branches)):
        weighted = (list(zip(gmms, gmm_weights)) if branches is None
                    else [(m, scale * w) for w, m in branches])
        kept = None if memo is None else (memo, (memo_key, k), list(curve_ims))
        _add_spectrum_sums(moments, sums, site_lon, site_lat, site_vs30, part_set, weighted, cond, ims, ln_targets,
                           truncation_sigma, max_distance_km, region, site_block, ref, site_fields, chunk, kept)
    return moments, sums


def _at_conditioning(gmm, minp, cond, kept, first_site, g):
    """Ln median [ln g] and sigma (n_cond, n_pairs) of the model at the conditioning IMs, kept values if any."""
    if kept is not None:
        memo, part_key, curve_ims = kept
        hit = memo.get(values_key(part_key, first_site, g, gmm, curve_ims))
        if hit is not None:
            rows = [curve_ims.index(c) for c in cond]
            return hit[0][rows], hit[1][rows]
    res = gmm.evaluate(minp, cond)
    return res.ln_median, res.sigma


def _add_spectrum_sums(moments, sums, site_lon, site_lat, site_vs30, ruptures, weighted, cond, ims, ln_targets,
                       truncation_sigma, max_distance_km, region, site_block, ref, site_fields, chunk, kept):
    """Adds one region's weighted moments and spectral sums in place (:func:`compute_spectrum_sums`)."""
    for blk, site, rup, inp, d, rate in _per_pair_blocks(
            site_lon, site_lat, site_vs30, ruptures, max_distance_km, region, site_block, ref, site_fields):
        n_blk = blk.stop - blk.start
        targets = ln_targets[:, blk]
        for g, (gmm, w) in enumerate(weighted):
            minp = model_input(inp, gmm)
            mu_cond, sd_cond = _at_conditioning(gmm, minp, cond, kept, blk.start, g)
            keep = np.flatnonzero(_contributing(targets, mu_cond, sd_cond, rate, site, truncation_sigma))
            for part in _site_chunks(keep, site[keep], chunk):
                res = gmm.evaluate(_subset(minp, part), ims)
                for c in range(len(cond)):
                    m, s = spectrum_sums_from_pairs(
                        targets[c], mu_cond[c, part], sd_cond[c, part], rate[part], site[part],
                        ruptures.mag[rup[part]], d["rrup_km"][part], res.ln_median, res.sigma, n_blk,
                        truncation_sigma)
                    moments[c, blk] += w * m
                    sums[c, blk] += w * s


class CausalSpectrum(NamedTuple):
    """The conditional mean spectrum of the mean-disaggregation scenario (:func:`spectrum_from_sums`).

    Shapes: ``S`` the leading shape of the sums (e.g. (n_cond, n_sites, n_targets)).
    """

    mean_mag: np.ndarray  #: S [Mw], exact disaggregation mean
    mean_dist_km: np.ndarray  #: S [km], exact disaggregation mean Rrup
    mean_eps: np.ndarray  #: S [-], exact disaggregation mean epsilon
    scenario_eps: np.ndarray  #: S [-], epsilon of the target for the scenario (used by the spectrum)
    correlation: np.ndarray  #: (n_periods,) or (n_cond, n_periods) [-], rho(T, T*)
    ln_median: np.ndarray  #: S + (n_periods,) [ln g], scenario ln median
    sigma: np.ndarray  #: S + (n_periods,) [ln units], scenario total sigma
    ln_cms: np.ndarray  #: S + (n_periods,) [ln g], conditional mean
    conditional_sigma: np.ndarray  #: S + (n_periods,) [ln units]


def spectrum_from_sums(moments, sums, ln_targets, conditioning_ims, ims):
    r"""The conditional mean spectrum and sigma of the mean-disaggregation scenario.

    Parameters
    ----------
    moments : ndarray, shape (n_cond, ..., 5)
        Disaggregation moments at the targets (:func:`compute_spectrum_sums`).
    sums : ndarray, shape (n_cond, ..., 2, n_periods)
        Spectral sums with the same weights.
    ln_targets : ndarray, shape (n_cond, ...) [ln g]
        The targets at the conditioning IMs.
    conditioning_ims : sequence of str
        ``n_cond`` IMs, each one of ``ims``.
    ims : sequence of str
        IMs of the spectrum.

    Returns
    -------
    CausalSpectrum
        ``correlation`` of shape (n_cond, n_periods); NaN where nothing contributes to a
        target (or the target is NaN).

    Notes
    -----
    :math:`\bar\mu(T) = \sum w\mu / \sum w`, :math:`\bar\sigma(T) = \sum w\sigma / \sum w`
    (module notes), then :func:`conditional_mean_spectrum` with :math:`\rho` from the
    Baker & Jayaram (2008) matrix (:func:`quakefolio.core.events.gmf.cross_im_correlation_matrix`).
    """
    ims = list(ims)
    m = np.asarray(moments, dtype=float)
    s = np.asarray(sums, dtype=float)
    mean_mag, mean_dist, mean_eps = disaggregation_means(m)
    total = m[..., 0][..., None]
    with np.errstate(invalid="ignore", divide="ignore"):
        ln_median = np.where(total > 0, s[..., 0, :] / total, np.nan)
        sigma = np.where(total > 0, s[..., 1, :] / total, np.nan)
    corr = cross_im_correlation_matrix(ims)
    rho = np.empty((len(conditioning_ims), len(ims)))
    eps = np.empty(mean_mag.shape)
    ln_cms = np.empty(ln_median.shape)
    cond_sigma = np.empty(ln_median.shape)
    for c, im in enumerate(conditioning_ims):
        k = ims.index(parse_im(im))
        rho[c] = corr[k]
        eps[c], ln_cms[c], cond_sigma[c] = conditional_mean_spectrum(ln_targets[c], ln_median[c], sigma[c], rho[c], k)
    return CausalSpectrum(mean_mag, mean_dist, mean_eps, eps, rho, ln_median, sigma, ln_cms, cond_sigma)
