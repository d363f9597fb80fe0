"""Located warnings about accepted but doubtful inputs, gathered once by the read-inputs stage.

Each check gives at most one :class:`~quakefolio.core.errors.InputWarning` naming the file,
row and column of the first doubtful value (and how many more there are); the command line
prints each as one ``warning:`` line.  The bounds and their reasons are in
:mod:`quakefolio.core.plausibility` and, for the ground-motion models, in their
``applicability`` (:mod:`quakefolio.core.gmm`).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputWarning, locate_toml_line
from quakefolio.core.plausibility import SITE_DISTANCE_WARN_KM

__all__ = ["INGEST_ONLY_KEYS", "COMPUTE_ONLY_KEYS", "input_warnings", "model_range"]

#: ``[hazard]`` keys read in one mode only (the others apply to both).
INGEST_ONLY_KEYS = ("curves_file", "im_unit", "statistic", "max_site_distance_km", "period_interpolation")
COMPUTE_ONLY_KEYS = ("source_models", "gmm_branches", "truncation_sigma", "integration_distance_km", "ims",
                     "im_levels_g", "fractiles", "site_spacing_km", "default_vs30_mps", "region", "disaggregation",
                     "cms_conditioning_ims", "cms_return_periods_yr", "propagate_branches")


def _more(n):
    return "" if n <= 1 else f" (and {n - 1} more)"


def mode_key_warning(config):
    """A warning for ``[hazard]`` keys of the other mode, which the run ignores; None if there are none.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config

    Returns
    -------
    InputWarning or None
        At the line of the first such key in the config file.
    """
    mode = config.hazard.mode
    other, foreign = ("compute", COMPUTE_ONLY_KEYS) if mode == "ingest" else ("ingest", INGEST_ONLY_KEYS)
    given = [k for k in config.raw.get("hazard", {}) if k in foreign]
    if not given:
        return None
    text = Path(config.path).read_text(encoding="utf-8-sig")
    also = f" (also {', '.join(given[1:])})" if len(given) > 1 else ""
    return InputWarning(config.path, f"applies to mode = \"{other}\" only and is ignored with mode = \"{mode}\"{also}",
                        row=locate_toml_line(text, ("hazard",), given[0]), column=f"hazard.{given[0]}")


def distance_warning(config, exposure, site_id, site_index, distance_km):
    """A warning for assets more than :data:`~quakefolio.core.plausibility.SITE_DISTANCE_WARN_KM`
    from their hazard site (allowed by a raised ``max_site_distance_km`` or a coarse
    ``site_spacing_km``); None if there are none.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        Validated exposure with ``asset_id`` and ``row``.
    site_id : ndarray of str (n_sites,)
    site_index : ndarray of int (n_assets,)
    distance_km : ndarray (n_assets,) [km]

    Returns
    -------
    InputWarning or None
        At the exposure row of the first such asset, column ``lon``.
    """
    far = np.asarray(distance_km) > SITE_DISTANCE_WARN_KM
    if not far.any():
        return None
    i = int(np.argmax(far))
    hz = config.hazard
    key = (f"max_site_distance_km = {hz.max_site_distance_km:g}" if hz.mode == "ingest"
           else f"site_spacing_km = {hz.site_spacing_km:g}")
    return InputWarning(config.exposure.file, f"asset {str(exposure.asset_id.iloc[i])!r} is {distance_km[i]:.0f} km "
                                              f"from its hazard site {str(site_id[site_index[i]])!r} ([hazard] {key}): "
                                              f"hazard more than {SITE_DISTANCE_WARN_KM:g} km away says little of the "
                                              f"asset's shaking{_more(int(far.sum()))}",
                        row=int(exposure.row.iloc[i]), column="lon")


def deductible_warning(path, exposure):
    """A warning for a deductible not below the replacement value (the net building loss is then
    always 0); None if there is none.

    Parameters
    ----------
    path : str or Path
        The exposure file.
    exposure : pandas.DataFrame
        Validated exposure with ``deductible``, ``replacement_value`` and ``row``.

    Returns
    -------
    InputWarning or None
    """
    over = (exposure.deductible >= exposure.replacement_value).to_numpy()
    if not over.any():
        return None
    i = int(np.argmax(over))
    return InputWarning(path, f"deductible {exposure.deductible.iloc[i]:g} is not below the replacement value "
                              f"{exposure.replacement_value.iloc[i]:g} of asset {str(exposure.asset_id.iloc[i])!r}: "
                              f"its net building loss is always 0{_more(int(over.sum()))}",
                        row=int(exposure.row.iloc[i]), column="deductible")


def model_range(gmms, key):
    """The range ``(lo, hi)`` covered by any of the ground-motion models for ``key`` of their
    ``applicability`` (``"mag"``: over every mechanism; ``"vs30_mps"``).

    Parameters
    ----------
    gmms : sequence of (id, weight, ground-motion model)
    key : str

    Returns
    -------
    (float, float) and str
        The range and the models' ranges in words, e.g. ``"BSSA14 150-1500, CB14 150-1500"``.
    """
    spans = []
    for gid, _, gmm in gmms:
        value = gmm.applicability.get(key)
        if isinstance(value, dict):
            value = (min(v[0] for v in value.values()), max(v[1] for v in value.values()))
        if value is not None:
            spans.append((gid, float(value[0]), float(value[1])))
    if not spans:
        return (-np.inf, np.inf), ""
    words = ", ".join(f"{g} {lo:g}-{hi:g}" for g, lo, hi in spans)
    return (min(s[1] for s in spans), max(s[2] for s in spans)), words


def vs30_warning(config, exposure, gmms):
    """A warning for a Vs30 outside every ground-motion model's range (compute mode); None if
    there is none.  Assets without ``vs30_mps`` use ``[hazard] default_vs30_mps``.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        Validated exposure with ``vs30_mps`` (NaN: none) and ``row``.
    gmms : sequence of (id, weight, ground-motion model)

    Returns
    -------
    InputWarning or None
        At the exposure row of the first such asset, or at the config's ``default_vs30_mps``.
    """
    (lo, hi), words = model_range(gmms, "vs30_mps")
    vs30 = exposure.vs30_mps.to_numpy(dtype=float)
    outside = ~np.isnan(vs30) & ((vs30 < lo) | (vs30 > hi))
    tail = f"outside the range of every ground-motion model of the run ({words} m/s): the models are extrapolated"
    if outside.any():
        i = int(np.argmax(outside))
        return InputWarning(config.exposure.file, f"Vs30 {vs30[i]:g} m/s of asset {str(exposure.asset_id.iloc[i])!r} "
                                                  f"is {tail}{_more(int(outside.sum()))}",
                            row=int(exposure.row.iloc[i]), column="vs30_mps")
    default = config.hazard.default_vs30_mps
    if np.isnan(vs30).any() and not lo <= default <= hi:
        text = Path(config.path).read_text(encoding="utf-8-sig")
        n = int(np.isnan(vs30).sum())
        return InputWarning(config.path, f"Vs30 {default:g} m/s (of the {n} asset{'s' if n > 1 else ''} without "
                                         f"vs30_mps) is {tail}",
                            row=locate_toml_line(text, ("hazard",), "default_vs30_mps"), column="hazard.default_vs30_mps")
    return None


def magnitude_warnings(model):
    """One warning per source-model file whose magnitudes leave the range of every ground-motion
    model of the run.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With ``source_branches`` (their :class:`~quakefolio.pipeline.io.source_model.SourceModel`)
        and ``gmm_branches``.

    Returns
    -------
    list of InputWarning
        At the ``mfd`` line of the first such source of each file.
    """
    (lo, hi), words = model_range(model.gmm_branches, "mag")
    out, seen = [], set()
    for _, _, src in model.source_branches:
        if src.path in seen:
            continue
        seen.add(src.path)
        for row, column, m_lo, m_hi in src.magnitudes:
            if m_lo < lo or m_hi > hi:
                out.append(InputWarning(src.path, f"magnitudes {m_lo:g} to {m_hi:g} leave the range of every "
                                                  f"ground-motion model of the run ({words}): their ground motion is "
                                                  "extrapolated", row=row, column=column))
                break
    return out


def input_warnings(config, library, exposure, hazard, site_index, distance_km, model):
    """Every located warning about the run's inputs, in a fixed order.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    library : quakefolio.fragility.FragilityLibrary
        With ``warnings`` from reading the library.
    exposure : pandas.DataFrame
        Validated exposure.
    hazard : quakefolio.pipeline.io.ingest.HazardCurves
        Tabulated curves (with ``warnings`` from reading them) or the computed-hazard sites.
    site_index : ndarray of int (n_assets,)
    distance_km : ndarray (n_assets,) [km]
    model : quakefolio.pipeline.stages.hazard.HazardModel or None
        The computed-hazard model (compute mode), else None.

    Returns
    -------
    list of InputWarning
    """
    found = [mode_key_warning(config), *library.warnings, *hazard.warnings,
             distance_warning(config, exposure, hazard.site_id, site_index, distance_km),
             deductible_warning(config.exposure.file, exposure)]
    if model is not None:
        found.append(vs30_warning(config, exposure, model.gmm_branches))
        seen = set()
        for _, _, src in model.source_branches:
            if src.path not in seen:
                seen.add(src.path)
                found.extend(src.warnings)
        found.extend(magnitude_warnings(model))
    return [w for w in found if w is not None]
