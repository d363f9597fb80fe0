"""The ``read inputs`` stage: every user file read and validated once, cross-file checks, the
asset-to-site mapping, and the inputs digest; returns a frozen :class:`RunInputs`.
"""
from __future__ import annotations

import hashlib
import json
from dataclasses import replace

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.fragility import CrossingError, load_library
from quakefolio.pipeline.io.cache import StageCache
from quakefolio.pipeline.io.config import load_config, sha256_file
from quakefolio.pipeline.io.ingest import (
    UnavailableIM, curves_for_im, map_assets_to_sites, read_exposure, read_hazard_curves,
)
from quakefolio.pipeline.stages.hazard import prepare_compute
from quakefolio.pipeline.stages.products import RunInputs, frozen_mapping
from quakefolio.pipeline.stages.whatif import validate as validate_alternatives

__all__ = ["RunInputs", "load_inputs", "inputs_digest", "stage_cache", "with_hazard", "unique_pairs"]


def inputs_digest(input_hashes, config):
    """sha256 over the input files' digests and the resolved config.

    Parameters
    ----------
    input_hashes : Mapping
        Path and sha256 of every input file.
    config : quakefolio.pipeline.io.config.Config

    Returns
    -------
    str
        Hex digest.
    """
    blob = json.dumps({"inputs": dict(input_hashes), "config": config.resolved()}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()


def stage_cache(inputs):
    """The run's content cache (``<output>/cache``), enabled per ``[execution] cache``.

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    quakefolio.pipeline.io.cache.StageCache
    """
    return StageCache(inputs.config["output"]["folder"], enabled=inputs.config["execution"]["cache"])


def load_inputs(config_or_path):
    """Read and validate every input of a run; raise InputError at the first problem.

    Ingest mode reads the tabulated curves and maps assets to the nearest site; compute
    mode reads the source models and builds hazard sites from the exposure (the curves
    are computed later by :mod:`quakefolio.pipeline.stages.hazard`).  Cross-file checks
    (class IMs available, curves do not cross, retrofit alternatives) run here, once.

    Parameters
    ----------
    config_or_path : str, Path or quakefolio.pipeline.io.config.Config

    Returns
    -------
    RunInputs
    """
    config = config_or_path if hasattr(config_or_path, "sections") else load_config(config_or_path)
    hz, ex, fr = config["hazard"], config["exposure"], config["fragility"]
    library = load_library(fr["library"])
    exposure = read_exposure(ex["file"], library)
    hashes = {
        "config": {"path": str(config.path), "sha256": config.sha256},
        "fragility_library": {"path": str(fr["library"]), "sha256": library.sha256},
        "exposure": {"path": str(ex["file"]), "sha256": sha256_file(ex["file"])},
    }
    model = None
    if hz["mode"] == "ingest":
        hazard = read_hazard_curves(hz["curves_file"], im_unit=hz["im_unit"], statistic=hz["statistic"])
        hashes["hazard_curves"] = {"path": str(hz["curves_file"]), "sha256": sha256_file(hz["curves_file"])}
        site_index, dist = map_assets_to_sites(exposure, hazard, max_distance_km=hz["max_site_distance_km"],
                                               exposure_path=ex["file"])
    else:
        model, hazard, site_index, dist = prepare_compute(config, exposure, library)
        for bid, _, src in model.source_branches:
            hashes[f"source_model:{bid}"] = {"path": src.path, "sha256": src.sha256}
    text = None
    for code in sorted(set(exposure.building_class)):
        dss = library[code]
        if model is None:
            try:
                levels, _ = curves_for_im(hazard, dss.im, allow_interpolation=hz["period_interpolation"])
            except UnavailableIM as exc:
                text = text or open(fr["library"], encoding="utf-8").read()
                raise InputError(fr["library"], f"class {code!r}: {exc}",
                                 row=locate_toml_line(text, ("classes", code), "im"), column=f"classes.{code}.im") \
                    from None
        else:
            levels = model.levels_g
        if fr["crossing"] == "reject":
            try:
                dss.check_crossing(float(levels.min()), float(levels.max()))
            except CrossingError as exc:
                text = text or open(fr["library"], encoding="utf-8").read()
                j = dss.names.index(exc.upper)
                raise InputError(fr["library"], str(exc),
                                 row=locate_toml_line(text, ("classes", code, "states"), "beta", j),
                                 column=f"classes.{code}.states[{j}].beta") from None
    warnings = []
    if hazard.interpolated:
        warnings.append(f"hazard interpolated across periods for {', '.join(sorted(hazard.interpolated))} "
                        "(log-log between neighbouring tabulated periods)")
    draft = RunInputs(config, library, hazard, exposure, site_index, dist, hashes, "", tuple(warnings), model)
    validate_alternatives(draft, hashes)  # retrofit alternatives: asset ids, classes, IMs; adds their library files
    return replace(draft, input_hashes=frozen_mapping(hashes), inputs_sha256=inputs_digest(hashes, config))


def with_hazard(inputs, model, hazard):
    """The run inputs with the computed hazard (a new object; compute mode).

    Parameters
    ----------
    inputs : RunInputs
    model : quakefolio.pipeline.stages.hazard.HazardModel
        With branch curves and statistics (and disaggregation, if any).
    hazard : quakefolio.pipeline.io.ingest.HazardCurves
        With the mean curves per IM.

    Returns
    -------
    RunInputs
    """
    return replace(inputs, hazard_model=model, hazard=hazard)


def unique_pairs(inputs):
    """Number of unique (hazard site, building class) pairs of the exposure (the unit of damage work).

    Parameters
    ----------
    inputs : RunInputs

    Returns
    -------
    int
    """
    classes = inputs.exposure.building_class.to_numpy()
    return sum(len(np.unique(inputs.site_index[classes == code])) for code in set(classes))
