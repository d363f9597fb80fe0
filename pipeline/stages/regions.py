"""Tectonic regions of the compute-mode hazard: branches per region, their checks and the site inputs.

Each source of a source-model file carries a tectonic region (``region``, default
``active_crustal``; :mod:`quakefolio.pipeline.io.source_model`).  The active-crustal
ruptures are evaluated with ``[hazard] gmm_branches``, the others with their region's
``[hazard] region_gmm_branches`` (:mod:`quakefolio.pipeline.io.gmm_regions`); the
combination rule is :func:`quakefolio.core.hazard.compute_site_hazard`.

Site inputs of the models (per hazard site, from the exposure's optional columns):
``z1p0_km`` and ``z2p5_km`` (basin depths [km], passed to the models with a basin term;
where not given each model uses its own Vs30 relation) and ``backarc`` (1 for a site in
the backarc of a subduction zone; where not given, ``[hazard] site_backarc``).  A site's
value is the mean of its assets' given values (NaN where none gives one; for
``backarc``, 1 when any of its assets says so).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.gmm import get_gmm
from quakefolio.pipeline.io.gmm_regions import missing_regions

__all__ = ["region_model_branches", "check_source_regions", "site_inputs", "SITE_INPUT_COLUMNS"]

#: Optional exposure columns that become per-site ground-motion inputs.
SITE_INPUT_COLUMNS = ("z1p0_km", "z2p5_km", "backarc")


def region_model_branches(hazard_settings):
    """The ground-motion branches of the regions other than active crustal.

    Parameters
    ----------
    hazard_settings : quakefolio.pipeline.io.config.HazardSettings

    Returns
    -------
    dict of str to tuple of (id, weight, model)
    """
    return {region: tuple((b["id"], b["weight"], get_gmm(b["model"])) for b in rows)
            for region, rows in (hazard_settings.region_gmm_branches or {}).items()}


def _error(config, message, section, key):
    text = Path(config.path).read_text(encoding="utf-8-sig")
    return InputError(config.path, message, row=locate_toml_line(text, (section,), key), column=f"{section}.{key}")


def check_source_regions(config, sources):
    """Every source region has branches, and the stages that take active-crustal sources only see no other.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    sources : sequence of (id, weight, SourceModel)

    Returns
    -------
    tuple of str
        Regions of the sources, in :data:`quakefolio.core.gmm.TECTONIC_REGIONS` order.

    Raises
    ------
    InputError
        Naming the config key: a region without ``region_gmm_branches``; sources of
        another region with the event-based portfolio or the conditional mean spectrum on.
    """
    from quakefolio.core.gmm import TECTONIC_REGIONS

    present = set()
    for bid, _, src in sources:
        regions = src.ruptures.regions
        present.update(regions)
        missing = missing_regions(regions, config.hazard.region_gmm_branches)
        if missing:
            raise _error(config, f"source model {bid!r} has {missing[0]} sources but region_gmm_branches gives "
                                 f"no ground-motion branches for {missing[0]}", "hazard", "source_models")
    others = sorted(present - {"active_crustal"})
    if others and config.portfolio.event_based:
        raise _error(config, f"the event-based portfolio takes active-crustal sources only so far; the source models "
                             f"have {', '.join(others)} sources: set event_based = false", "portfolio", "event_based")
    if others and config.hazard.cms_conditioning_ims:
        raise _error(config, f"the conditional mean spectrum takes active-crustal sources only so far; the source "
                             f"models have {', '.join(others)} sources", "hazard", "cms_conditioning_ims")
    return tuple(r for r in TECTONIC_REGIONS if r in present)


def site_inputs(exposure, site_index, n_sites, default_backarc):
    """Per-site ground-motion inputs from the exposure's optional columns.

    Parameters
    ----------
    exposure : pandas.DataFrame
        Validated exposure (columns of :data:`SITE_INPUT_COLUMNS`, NaN where not given).
    site_index : ndarray of int, shape (n_assets,)
        Site of every asset.
    n_sites : int
    default_backarc : bool
        ``[hazard] site_backarc``.

    Returns
    -------
    dict of str to ndarray, shape (n_sites,)
        ``backarc`` (0 or 1) always; ``z1p0_km`` and ``z2p5_km`` [km] only where some
        asset gives one (NaN at sites without a value: the model's own Vs30 relation).
    """
    idx = np.asarray(site_index)
    out = {}
    for col in ("z1p0_km", "z2p5_km"):
        values = exposure[col].to_numpy(dtype=float) if col in exposure.columns else np.full(len(idx), np.nan)
        given = np.isfinite(values)
        if given.any():
            total = np.bincount(idx[given], weights=values[given], minlength=n_sites)
            count = np.bincount(idx[given], minlength=n_sites)
            with np.errstate(invalid="ignore", divide="ignore"):
                out[col] = np.where(count > 0, total / np.maximum(count, 1), np.nan)
    flag = exposure["backarc"].to_numpy(dtype=float) if "backarc" in exposure.columns else np.full(len(idx), np.nan)
    flag = np.where(np.isfinite(flag), flag, 1.0 if default_backarc else 0.0)
    out["backarc"] = (np.bincount(idx, weights=flag, minlength=n_sites) > 0).astype(float)
    return out
