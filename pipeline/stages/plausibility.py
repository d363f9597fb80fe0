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

__all__ = ["INGEST_ONLY_KEYS", "COMPUTE_ONLY_KEYS", "input_warnings", "model_range", "combination_warning"]

#: ``[hazard]`` keys read in one mode only (the others apply to both).
INGEST_ONLY_KEYS = ("curves_file", "im_unit", "statistic", "max_site_distance_km", "period_interpolation")
COMPUTE_ONLY_KEYS = ("source_models", "gmm_branches", "truncation_sigma", "integration_distance_km", "ims",
                     "im_levels_g", "fractiles", "site_spacing_km", "default_vs30_mps", "region", "disaggregation",
                     "cms_conditioning_ims", "cms_return_periods_yr", "propagate_branches", "region_gmm_branches",
                     "site_backarc", "fractile_combinations_max")
#: Exposure columns that are ground-motion inputs of the compute mode (stages.regions.SITE_INPUT_COLUMNS).
_SITE_INPUT_COLUMNS = ("z1p0_km", "z2p5_km", "backarc")


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


def site_column_warning(config, exposure):
    """A warning for ground-motion site inputs given in ingest mode, which the run ignores; None if none.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        Validated exposure with ``asset_id`` and ``row``.

    Returns
    -------
    InputWarning or None
        At the exposure row of the first asset giving one, in the first such column.
    """
    if config.hazard.mode != "ingest":
        return None
    for col in _SITE_INPUT_COLUMNS:
        if col not in exposure.columns:
            continue
        given = np.isfinite(exposure[col].to_numpy(dtype=float))
        if given.any():
            i = int(np.argmax(given))
            return InputWarning(config.exposure.file, f"{col} of asset {str(exposure.asset_id.iloc[i])!r} is ignored "
                                                      "with mode = \"ingest\": the tabulated hazard curves already hold "
                                                      "the site conditions (a ground-motion input of mode = \"compute\")",
                                row=int(exposure.row.iloc[i]), column=col)
    return None


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


def _outside(gmms, vs30):
    """The models of ``gmms`` whose Vs30 range excludes ``vs30`` [m/s], in words (empty: none)."""
    words = []
    for gid, _, gmm in gmms:
        span = gmm.applicability.get("vs30_mps")
        if span is not None and not span[0] <= vs30 <= span[1]:
            words.append(f"{gid} {span[0]:g}-{span[1]:g}")
    return ", ".join(words)


def vs30_warning(config, exposure, gmms):
    """A warning for a Vs30 outside some ground-motion model's range (compute mode); None if
    there is none.  Assets without ``vs30_mps`` use ``[hazard] default_vs30_mps``.

    The stated rule (:func:`quakefolio.core.pairs.model_input`): each model takes such a
    Vs30 clamped to its own range.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    exposure : pandas.DataFrame
        Validated exposure with ``vs30_mps`` (NaN: none) and ``row``.
    gmms : sequence of (id, weight, ground-motion model)
        Every model of the run (every region's in use).

    Returns
    -------
    InputWarning or None
        At the exposure row of the first such asset, or at the config's ``default_vs30_mps``.
    """
    vs30 = exposure.vs30_mps.to_numpy(dtype=float)
    outside = np.array([bool(_outside(gmms, v)) if np.isfinite(v) else False for v in vs30], dtype=bool)

    def tail(words):
        several = "," in words
        return (f"outside the range of ground-motion model{'s' if several else ''} {words} m/s: "
                f"{'each of them takes' if several else 'the model takes'} it clamped to "
                f"{'its' if several else 'the'} range")
    if outside.any():
        i = int(np.argmax(outside))
        return InputWarning(config.exposure.file, f"Vs30 {vs30[i]:g} m/s of asset {str(exposure.asset_id.iloc[i])!r} "
                                                  f"is {tail(_outside(gmms, vs30[i]))}{_more(int(outside.sum()))}",
                            row=int(exposure.row.iloc[i]), column="vs30_mps")
    default = config.hazard.default_vs30_mps
    words = _outside(gmms, default)
    if np.isnan(vs30).any() and words:
        text = Path(config.path).read_text(encoding="utf-8-sig")
        n = int(np.isnan(vs30).sum())
        return InputWarning(config.path, f"Vs30 {default:g} m/s (of the {n} asset{'s' if n > 1 else ''} without "
                                         f"vs30_mps) is {tail(words)}",
                            row=locate_toml_line(text, ("hazard",), "default_vs30_mps"), column="hazard.default_vs30_mps")
    return None


def _every_model(model):
    """Every (id, weight, model) of the run: the active-crustal branches, then the other regions' in use."""
    return list(model.gmm_branches) + [b for rows in model.region_branches.values() for b in rows]


def magnitude_warnings(model):
    """One warning per source-model file whose magnitudes leave the range of every ground-motion
    model of their source's tectonic region.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With ``source_branches`` (their :class:`~quakefolio.pipeline.io.source_model.SourceModel`),
        ``gmm_branches`` and ``region_branches``.

    Returns
    -------
    list of InputWarning
        At the ``mfd`` line of the first such source of each file.
    """
    out, seen = [], set()
    for _, _, src in model.source_branches:
        if src.path in seen:
            continue
        seen.add(src.path)
        for row, column, m_lo, m_hi, region in src.magnitudes:
            gmms = model.gmm_branches if region == "active_crustal" else model.region_branches.get(region, ())
            (lo, hi), words = model_range(gmms, "mag")
            if m_lo < lo or m_hi > hi:
                out.append(InputWarning(src.path, f"magnitudes {m_lo:g} to {m_hi:g} leave the range of every "
                                                  f"ground-motion model of the {region} region ({words}): their "
                                                  "ground motion is extrapolated", row=row, column=column))
                break
    return out


def combination_warning(config, model):
    """A warning when the hazard fractiles are taken on a sample of the logic tree's combinations; else None.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With ``combinations`` (:func:`quakefolio.core.combinations.tree_combinations`).

    Returns
    -------
    InputWarning or None
        At ``[hazard] fractile_combinations_max`` when the config gives it, else at
        ``[hazard] gmm_branches``.
    """
    combos = model.combinations
    if combos is None or not combos.sampled or not (model.fractiles or config.hazard.propagate_branches):
        return None
    key = "fractile_combinations_max" if "fractile_combinations_max" in config.raw.get("hazard", {}) else "gmm_branches"
    text = Path(config.path).read_text(encoding="utf-8-sig")
    carried = " (and the propagated branches)" if config.hazard.propagate_branches else ""
    return InputWarning(config.path, f"the logic tree has {combos.total:,} combinations of a source-model branch and "
                                     f"one ground-motion model per tectonic region, more than fractile_combinations_max "
                                     f"= {config.hazard.fractile_combinations_max:,}: the fractiles{carried} are taken "
                                     f"on a sample of {len(combos):,} combinations drawn by weight ([portfolio] seed)",
                        row=locate_toml_line(text, ("hazard",), key), column=f"hazard.{key}")


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
             deductible_warning(config.exposure.file, exposure), site_column_warning(config, exposure)]
    if model is not None:
        found.append(vs30_warning(config, exposure, _every_model(model)))
        seen = set()
        for _, _, src in model.source_branches:
            if src.path not in seen:
                seen.add(src.path)
                found.extend(src.warnings)
        found.extend(magnitude_warnings(model))
        found.append(combination_warning(config, model))
    return [w for w in found if w is not None]
