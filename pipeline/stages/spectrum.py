"""Conditional mean spectrum of the compute-mode hazard: settings check, site blocks, table.

``[hazard] cms_conditioning_ims`` (off when empty) and ``cms_return_periods_yr``: at every
hazard site, return period T and conditioning IM, the target is the mean hazard curve's
IM at rate 1/T; the spectrum conditioned on it uses the mean-disaggregation scenario of
that target (every source branch, ground-motion branch and (site, rupture) pair, with the
logic-tree weights).  Numerics: :mod:`quakefolio.core.cms`; this module checks the
settings, cuts the work into site blocks (cached per site) and lays out the table.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.core.cms import (
    CMS_MAX_PERIOD_S, CMS_MIN_PERIOD_S, SPECTRUM_SUMS, compute_spectrum_sums, spectrum_from_sums, spectrum_ims,
)
from quakefolio.core.curves import im_at_rate
from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.gmm import get_gmm
from quakefolio.core.hazard import DISAGG_MOMENTS
from quakefolio.core.ims import im_period, model_period
from quakefolio.pipeline.io.cache import digest
from quakefolio.pipeline.stages.hazard import _assemble, _cached_rows, _memo, _region_kwargs, _site_keys, memo_key
from quakefolio.pipeline.stages.products import SiteBlockResult

__all__ = ["check_spectrum_settings", "conditioning_ims", "spectrum_block", "combine_spectrum", "spectrum_frame"]


def _key_error(config, message):
    text = Path(config.path).read_text(encoding="utf-8-sig")
    return InputError(config.path, message, row=locate_toml_line(text, ("hazard",), "cms_conditioning_ims"),
                      column="hazard.cms_conditioning_ims")


def check_spectrum_settings(config):
    """The conditioning IMs are distinct, within the correlation model's range and every model's periods.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
        The run configuration; only compute mode is checked (ingest mode ignores the keys
        with a warning, :mod:`quakefolio.pipeline.stages.plausibility`).

    Raises
    ------
    InputError
        At the line of ``cms_conditioning_ims`` in the config file, naming the IM.
    """
    ims = conditioning_ims(config)
    gmms = [(b["id"], b["weight"], get_gmm(b["model"])) for b in config.hazard.gmm_branches or ()]
    gmms += [(b["id"], b["weight"], get_gmm(b["model"]))
             for rows in (config.hazard.region_gmm_branches or {}).values() for b in rows]
    for i, im in enumerate(ims):
        if im in ims[:i]:
            raise _key_error(config, f"{im} is listed twice (IM names are compared by their period)")
        t = im_period(im)  # PGA counts as 0.01 s in the correlation model
        if not CMS_MIN_PERIOD_S <= t <= CMS_MAX_PERIOD_S:
            raise _key_error(config, f"{im}: expected PGA or SA_<T> with T from {CMS_MIN_PERIOD_S:g} to "
                                     f"{CMS_MAX_PERIOD_S:g} s (the range of the Baker & Jayaram 2008 correlation)")
        for gid, _, gmm in gmms:
            lo, hi = gmm.period_range_s
            if im not in gmm.supported_ims and not lo <= model_period(im) <= hi:
                raise _key_error(config, f"{im} is outside the periods of ground-motion model {gid} ({lo:g}-{hi:g} s)")


def _every_model(model):
    """The active-crustal models, then those of the other regions present (the spectrum's periods are common to all)."""
    return [g for _, _, g in model.gmm_branches] + [g for rows in model.region_branches.values() for _, _, g in rows]


def conditioning_ims(config):
    """The conditioning IMs of a run (empty: no conditional mean spectrum).

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config

    Returns
    -------
    list of str
        ``[hazard] cms_conditioning_ims`` in compute mode, else empty.
    """
    hz = config.hazard
    return list(hz.cms_conditioning_ims) if hz.mode == "compute" else []


def _targets(model, cond, return_periods, rate_floor, lo, hi):
    """ln target [ln g] (n_cond, n_block_sites, n_rp): the mean curve's IM at 1/T, NaN below the rate floor."""
    rates = 1.0 / np.asarray(return_periods, dtype=float)
    mean = model.statistics["mean"][[model.ims.index(im) for im in cond], lo:hi]
    with np.errstate(divide="ignore", invalid="ignore"):
        ln_x = np.log(im_at_rate(rates, model.levels_g, mean))
    return np.where(rates < rate_floor, np.nan, ln_x)


def spectrum_block(model, hazard, cond, return_periods, rate_floor, block, cache=None):
    """Disaggregation moments and spectral sums of one block of sites (cached per site).

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With statistics (the mean curves give the targets).
    hazard : HazardCurves
        The hazard sites.
    cond : sequence of str
        Conditioning IMs (among ``model.ims``).
    return_periods : sequence of float [yr]
    rate_floor : float [1/yr]
        Return periods whose rate lies below it get no spectrum.
    block : tuple (lo, hi)
        Site slice.
    cache : quakefolio.pipeline.io.cache.StageCache or None

    Returns
    -------
    SiteBlockResult
        ``values``: spectral sums (n_cond, n_block_sites, n_rp, 2, n_periods); ``moments``:
        (n_cond, n_block_sites, n_rp, 5), both summed over every branch with its weight
        (:func:`quakefolio.core.cms.compute_spectrum_sums`).
    """
    lo, hi = block
    gmms = [g for _, _, g in model.gmm_branches]
    ims = spectrum_ims(_every_model(model), cond)
    targets = _targets(model, cond, return_periods, rate_floor, lo, hi)
    site_keys = _site_keys(model, hazard, lo, hi)
    keys = [digest("spectrum-site", k, list(cond), list(map(float, return_periods)), ims, targets[:, j])
            for j, k in enumerate(site_keys)]
    per_site = (len(cond), len(return_periods))
    sums, moments, missing = _cached_rows(cache, "spectrum", keys, (hi - lo,) + per_site + (len(SPECTRUM_SUMS),
                                          len(ims)), "sums", ("moments", (hi - lo,) + per_site + (len(DISAGG_MOMENTS),)))
    sums = np.ascontiguousarray(np.moveaxis(sums, 0, 1))
    moments = np.ascontiguousarray(np.moveaxis(moments, 0, 1))
    if missing:
        idx = lo + np.array(missing)
        computed = [site_keys[j] for j in missing]
        for s_i, (_, ws, src) in enumerate(model.source_branches):
            m, s = compute_spectrum_sums(
                hazard.lon[idx], hazard.lat[idx], model.site_vs30[idx], src.ruptures, gmms,
                [ws * wg for _, wg, _ in model.gmm_branches], cond, ims, targets[:, missing],
                truncation_sigma=model.truncation_sigma, max_distance_km=model.max_distance_km, region=model.region,
                site_block=len(idx), ref=model.ref, memo=_memo(model), memo_key=memo_key(computed, s_i),
                curve_ims=model.ims, **_region_kwargs(model, idx))
            moments[:, missing] += m
            sums[:, missing] += s
        if cache is not None:
            for j in missing:
                cache.put("spectrum", keys[j], {"sums": sums[:, j], "moments": moments[:, j]})
    return SiteBlockResult(block, sums, len(keys) - len(missing), len(missing), moments=moments)


def combine_spectrum(model, hazard, parts):
    """The hazard model with the site blocks' spectral sums assembled (a new object).

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
    hazard : HazardCurves
    parts : list of SiteBlockResult
        From :func:`spectrum_block`.

    Returns
    -------
    HazardModel
        With ``spectrum_sums`` (n_cond, n_sites, n_rp, 2, n_periods) and
        ``spectrum_moments`` (n_cond, n_sites, n_rp, 5).
    """
    n = len(hazard.site_id)
    moments = _assemble([replace(p, values=p.moments) for p in parts], n, axis=1)
    return replace(model, spectrum_sums=_assemble(parts, n, axis=1), spectrum_moments=moments)


def _flags(targets, rates, rate_floor, total):
    flag = np.where(np.isnan(targets), "outside_range", np.where(total > 0, "ok", "no_contribution"))
    return np.where(rates < rate_floor, "below_rate_floor", flag)


def spectrum_frame(model, hazard, config):
    r"""The ``conditional_mean_spectrum`` table: one row per conditioning IM, site, return period and period.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With ``spectrum_sums`` (after :func:`combine_spectrum`).
    hazard : HazardCurves
        The sites.
    config : quakefolio.pipeline.io.config.Config
        ``[hazard]`` conditioning IMs, return periods and rate floor.

    Returns
    -------
    pandas.DataFrame
        ``site_id``, ``conditioning_im``, ``return_period_yr`` [yr], ``target_g`` [g] (the
        mean curve's IM at rate 1/T), ``flag`` (``ok``, ``below_rate_floor``,
        ``outside_range``, ``no_contribution``), ``mean_mag`` [Mw], ``mean_dist_km`` [km],
        ``mean_eps`` [-] (exact disaggregation means), ``scenario_eps`` [-] (the target's
        epsilon for the scenario), ``im``, ``period_s`` [s] (0 for PGA), ``correlation``
        [-], ``scenario_median_g`` [g], ``scenario_sigma`` [ln units], ``cms_g`` [g]
        (:math:`\exp(\bar\mu + \rho\varepsilon^*\bar\sigma)`), ``conditional_sigma``
        [ln units] (:math:`\bar\sigma\sqrt{1-\rho^2}`); NaN unless ``flag`` is ``ok``.
    """
    hz = config.hazard
    cond = conditioning_ims(config)
    rps = np.asarray(hz.cms_return_periods_yr, dtype=float)
    ims = spectrum_ims(_every_model(model), cond)
    targets = _targets(model, cond, rps, hz.rate_floor, 0, len(hazard.site_id))
    cs = spectrum_from_sums(model.spectrum_moments, model.spectrum_sums, targets, cond, ims)
    flag = _flags(targets, 1.0 / rps, hz.rate_floor, model.spectrum_moments[..., 0])
    ok = flag == "ok"
    n_c, n_s, n_t, n_p = cs.ln_cms.shape
    grid = np.meshgrid(np.arange(n_c), np.arange(n_s), np.arange(n_t), np.arange(n_p), indexing="ij")
    gc, gs, gt, gp = (g.ravel() for g in grid)
    per_target = lambda a: np.where(ok, a, np.nan)[gc, gs, gt]  # noqa: E731
    per_period = lambda a: np.where(ok[..., None], a, np.nan).ravel()  # noqa: E731
    return pd.DataFrame({
        "site_id": hazard.site_id[gs], "conditioning_im": np.array(cond, dtype=object)[gc],
        "return_period_yr": rps[gt], "target_g": per_target(np.exp(targets)), "flag": flag[gc, gs, gt],
        "mean_mag": per_target(cs.mean_mag), "mean_dist_km": per_target(cs.mean_dist_km),
        "mean_eps": per_target(cs.mean_eps), "scenario_eps": per_target(cs.scenario_eps),
        "im": np.array(ims, dtype=object)[gp], "period_s": np.array([model_period(im) for im in ims])[gp],
        "correlation": cs.correlation[gc, gp], "scenario_median_g": per_period(np.exp(cs.ln_median)),
        "scenario_sigma": per_period(cs.sigma), "cms_g": per_period(np.exp(cs.ln_cms)),
        "conditional_sigma": per_period(cs.conditional_sigma),
    })
