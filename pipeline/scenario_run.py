"""``quakefolio scenario CONFIG SCENARIO``: scenario earthquakes of a run config, stored as a run folder.

The run config gives the exposure, fragility library and hazard model (compute mode); the scenario
file the ruptures, realisations and seed (:mod:`quakefolio.pipeline.io.scenario_file`). The tables
(:mod:`quakefolio.pipeline.stages.scenario_tables`), ``manifest.json`` and ``report.html`` (unless
``[output] report = false``) go to a
new run folder under ``<[output] folder>/scenarios/runs/`` (its own ``LATEST``), written under a
partial name and renamed into place when complete (:class:`quakefolio.pipeline.io.store.RunWriter`),
so the portfolio runs of the output folder, its history and its ``LATEST`` are left as they are.
"""
from __future__ import annotations

import dataclasses
import json
import time
from pathlib import Path

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.io.relpaths import relative_paths
from quakefolio.pipeline.io.scenario_file import read_scenario, read_stations
from quakefolio.pipeline.io.store import RunWriter, new_run_id
from quakefolio.pipeline.report.sections_scenario import scenario_report
from quakefolio.pipeline.runner import package_versions
from quakefolio.pipeline.stages.scenario import run_scenario
from quakefolio.pipeline.stages.scenario_tables import SCENARIO_TABLES, scenario_units

__all__ = ["run_scenario_files", "SCENARIO_FOLDER"]

#: Sub-folder of the run config's output folder holding scenario runs.
SCENARIO_FOLDER = "scenarios"


def _spec(scenario_path, realisations, stations, station_sigma_ln):
    spec = read_scenario(scenario_path)
    if realisations is not None:
        spec = dataclasses.replace(spec, realisations=int(realisations))
    if stations is not None:
        spec = dataclasses.replace(spec, stations=read_stations(Path(stations), station_sigma_ln))
    return spec


def run_scenario_files(config_path, scenario_path, *, realisations=None, stations=None, station_sigma_ln=0.0):
    """Read the inputs, run the scenario and store it; return the run folder and the located warnings.

    Parameters
    ----------
    config_path : str or Path
        The run config (compute mode).
    scenario_path : str or Path
        The scenario file.
    realisations : int or None
        Overrides the file's ``realisations``.
    stations : str or Path or None
        A station file overriding the scenario file's ``stations_file``.
    station_sigma_ln : float [ln units]
        Measurement standard deviation of records without ``sigma_ln`` in ``stations``.

    Returns
    -------
    (pathlib.Path, tuple, ScenarioProduct)
        The committed run folder, the warnings (inputs and stations) and the product.

    Raises
    ------
    InputError
        Any bad input (nothing is written then).
    """
    from quakefolio.pipeline.stages import load_inputs

    started = time.perf_counter()
    inputs = load_inputs(config_path)
    spec = _spec(scenario_path, realisations, stations, station_sigma_ln)
    product = run_scenario(inputs, spec)
    cfg = inputs.config
    out = Path(cfg.output.folder) / SCENARIO_FOLDER
    writer = RunWriter(out, new_run_id(out, spec.sha256))
    currency = cfg.scenario.currency
    provenance = {"run_id": writer.run_id, "inputs_sha256": inputs.inputs_sha256, "scenario_sha256": spec.sha256,
                  "quakefolio_version": package_versions()["quakefolio"], "currency": currency, "caution": CAUTION}
    base = Path(config_path).resolve().parent
    try:
        for name, frame in product.tables.items():
            writer.write_table(name, frame, units=scenario_units(name, currency, list(frame.columns)),
                               description=SCENARIO_TABLES[name]["description"], provenance=provenance)
        facts = [("run config", Path(config_path).name), ("scenario file", spec.path.name),
                 ("realisations per rupture", f"{spec.realisations:,}"), ("seed", str(spec.seed)),
                 ("stations", spec.stations.path.name if spec.stations is not None else "none")]
        if cfg.output.report:  # as for portfolio runs, [output] report = false leaves the report out
            writer.write_text("report.html", scenario_report(product.tables, title=spec.name or spec.path.stem,
                                                             run_id=writer.run_id, currency=currency, facts=facts))
        manifest = {"run_id": writer.run_id, "kind": "scenario", "caution": CAUTION,
                    "config": relative_paths(str(Path(config_path).resolve()), base),
                    "scenario_file": relative_paths(str(spec.path.resolve()), base), "scenario_sha256": spec.sha256,
                    "inputs_sha256": inputs.inputs_sha256, "seed": spec.seed, "realisations": spec.realisations,
                    "ruptures": [r.id for r in spec.ruptures], "conditioned": product.conditioned,
                    "stations_file": relative_paths(str(spec.stations.path), base) if spec.stations else None,
                    "packages": package_versions(), "currency": currency, "row_counts": dict(writer.row_counts),
                    "warnings": [str(w) for w in (*inputs.warnings, *product.warnings)],
                    "elapsed_s": round(time.perf_counter() - started, 3)}
        writer.write_text("manifest.json", json.dumps(relative_paths(manifest, base), indent=2, sort_keys=True,
                                                      default=float) + "\n")
        run_dir = writer.commit()
    except BaseException:
        writer.abort()
        raise
    return run_dir, tuple(inputs.warnings) + product.warnings, product
