"""The ``read inputs`` stage: every user file read and validated once, cross-file checks, the
asset-to-site mapping, and the inputs digest; returns a frozen :class:`RunInputs`.
"""
from __future__ import annotations

import hashlib
import json
import time
from dataclasses import replace

import numpy as np

from quakefolio.fragility import load_library
from quakefolio.pipeline.io.arrow_columns import index_of
from quakefolio.pipeline.io.breakdowns import check_breakdown_columns
from quakefolio.pipeline.io.cache import StageCache
from quakefolio.pipeline.io.config import load_config, sha256_file
from quakefolio.pipeline.io.group_terms import group_terms_for
from quakefolio.pipeline.io.ingest import map_assets_to_sites, read_exposure, read_hazard_curves
from quakefolio.pipeline.io.output_folder import check_output_folder
from quakefolio.pipeline.stages.checks import LibraryLines, TabulatedLevels, check_class_hazard, computed_levels
from quakefolio.pipeline.stages.hazard import prepare_compute
from quakefolio.pipeline.stages.plausibility import input_warnings
from quakefolio.pipeline.stages.products import RunInputs, frozen_mapping
from quakefolio.pipeline.stages.spectrum import check_spectrum_settings
from quakefolio.pipeline.stages.sizes import check_work, estimate_work, memory_budget
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
    return StageCache(inputs.config.output.folder, enabled=inputs.config.execution.cache)


def load_inputs(config_or_path):
    """Read and validate every input of a run; raise InputError at the first problem.

    The size of the work is estimated before any stage runs and a run that cannot fit the
    memory budget is refused, naming the key (:mod:`quakefolio.pipeline.stages.sizes`); the
    estimate is kept as ``work``.

    Ingest mode reads the tabulated curves and maps assets to the nearest site; compute
    mode reads the source models and builds hazard sites from the exposure (the curves
    are computed later by :mod:`quakefolio.pipeline.stages.hazard`).  Cross-file checks
    (class IMs available, curves do not cross, retrofit alternatives) run here, once, and
    the located warnings about doubtful inputs are gathered
    (:func:`quakefolio.pipeline.stages.plausibility.input_warnings`).

    Parameters
    ----------
    config_or_path : str, Path or quakefolio.pipeline.io.config.Config

    Returns
    -------
    RunInputs
    """
    started = time.perf_counter()
    config = config_or_path if hasattr(config_or_path, "sections") else load_config(config_or_path)
    folder_warnings = check_output_folder(config)  # where the run may write; nothing is written here
    budget = memory_budget()
    hz, ex, fr = config.hazard, config.exposure, config.fragility
    library = load_library(fr.library)
    exposure = read_exposure(ex.file, library, config.portfolio.secondary_group, keep=config.output.breakdown_columns)
    check_breakdown_columns(config, exposure)
    hashes = {
        "config": {"path": str(config.path), "sha256": config.sha256},
        "fragility_library": {"path": str(fr.library), "sha256": library.sha256},
        "exposure": {"path": str(ex.file), "sha256": sha256_file(ex.file)},
    }
    group_terms, group_warning = group_terms_for(config, exposure)
    if group_terms is not None:
        gt = config.programme.group_terms_file
        hashes["group_terms"] = {"path": str(gt), "sha256": sha256_file(gt)}
    lines = LibraryLines()
    model = None
    if hz.mode == "ingest":
        hazard = read_hazard_curves(hz.curves_file, im_unit=hz.im_unit, statistic=hz.statistic)
        hashes["hazard_curves"] = {"path": str(hz.curves_file), "sha256": sha256_file(hz.curves_file)}
        site_index, dist = map_assets_to_sites(exposure, hazard, max_distance_km=hz.max_site_distance_km,
                                               exposure_path=ex.file)
        levels_of = TabulatedLevels(hazard, hz.period_interpolation)
    else:
        check_spectrum_settings(config)
        model, hazard, site_index, dist = prepare_compute(config, exposure, library, lines, budget)
        for bid, _, src in model.source_branches:
            hashes[f"source_model:{bid}"] = {"path": src.path, "sha256": src.sha256}
        levels_of = computed_levels(model, config.path)
    for code in sorted(set(exposure.building_class.unique())):
        check_class_hazard(library[code], levels_of, fr.library, lines, reject_crossing=fr.crossing == "reject")
    if model is None:
        hazard = levels_of.hazard  # with the curves interpolated across periods for the classes
    warnings = [group_warning] if group_warning else []
    warnings += input_warnings(config, library, exposure, hazard, site_index, dist, model)
    warnings += folder_warnings
    if hazard.interpolated:
        warnings.append(f"hazard interpolated across periods for {', '.join(sorted(hazard.interpolated))} "
                        "(log-log between neighbouring tabulated periods)")
    draft = RunInputs(config, library, hazard, exposure, site_index, dist, hashes, "", tuple(warnings), model)
    # retrofit alternatives: asset ids, classes, IMs; adds their library files to hashes
    alternatives = validate_alternatives(draft, hashes, lines)
    if model is None:  # the new classes' IMs, interpolated as the checks did
        for alt in alternatives:
            hazard = hazard.with_im(alt.dss.im, allow_interpolation=hz.period_interpolation)
    work = estimate_work(draft, unique_pairs(draft), budget)
    check_work(draft, work)  # before any stage: what cannot fit is refused here, naming the key
    digest = inputs_digest(hashes, config)
    return replace(draft, hazard=hazard, input_hashes=frozen_mapping(hashes), inputs_sha256=digest,
                   group_terms=group_terms, work=work,
                   timings=frozen_mapping({"ingest_s": time.perf_counter() - started}))


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
    codes = sorted(set(inputs.exposure.building_class.unique()))
    cls = index_of(inputs.exposure.building_class, codes)
    site = np.asarray(inputs.site_index, dtype=np.int64)
    return len(np.unique(cls * (int(site.max(initial=0)) + 1) + site))  # one key per (class, site) pair
