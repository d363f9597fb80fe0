"""Writing a run and the pure-library path (no Prefect) used by tests and benchmarks."""
from __future__ import annotations

import hashlib
import json
import platform
import time
from importlib import metadata

from quakefolio.pipeline import stages
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import RunWriter, new_run_id
from quakefolio.pipeline.tables import TABLES, units_for

__all__ = ["write_run", "run_pure", "inputs_digest", "package_versions"]

_PACKAGES = ("quakefolio", "numpy", "scipy", "pandas", "pyarrow", "prefect")


def package_versions():
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    out["python"] = platform.python_version()
    return out


def inputs_digest(inputs):
    """sha256 over the input files' digests and the resolved config."""
    blob = json.dumps({"inputs": inputs.input_hashes, "config": inputs.config.resolved()}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()


def write_run(inputs, results, timings):
    """Assemble every table, write the run folder atomically, return its path."""
    t0 = time.perf_counter()
    cfg = inputs.config
    currency = cfg["scenario"]["currency"]
    frames = {
        "site_hazard": stages.site_hazard_table(inputs),
        "hazard_at_return_periods": stages.hazard_at_return_periods_table(inputs),
        **stages.build_tables(inputs, results),
    }
    digest = inputs_digest(inputs)
    output = cfg["output"]["folder"]
    run_id = new_run_id(output, digest)
    versions = package_versions()
    provenance = {"run_id": run_id, "inputs_sha256": digest, "quakefolio_version": versions["quakefolio"],
                  "currency": currency, "caution": CAUTION}
    writer = RunWriter(output, run_id)
    try:
        for name, frame in frames.items():
            writer.write_table(name, frame, units=units_for(name, currency), description=TABLES[name]["description"],
                               provenance=provenance)
        timings = dict(timings, store_s=time.perf_counter() - t0)
        manifest = {
            "run_id": run_id,
            "created_utc": run_id[:16],
            "caution": CAUTION,
            "scenario": cfg["scenario"]["name"],
            "inputs": inputs.input_hashes,
            "inputs_sha256": digest,
            "config": cfg.resolved(),
            "packages": versions,
            "seed": None,
            "timings_s": {k: round(v, 4) for k, v in timings.items()},
            "row_counts": dict(writer.row_counts),
            "units": {name: units_for(name, currency) for name in frames},
            "hazard_ims_interpolated": sorted(inputs.hazard.interpolated),
            "warnings": list(inputs.warnings),
        }
        writer.write_text("manifest.json", json.dumps(manifest, indent=2, sort_keys=True) + "\n")
        return writer.commit()
    except BaseException:
        writer.abort()
        raise


def run_pure(config_path):
    """The whole classical path without Prefect (same stage functions, sequential)."""
    t0 = time.perf_counter()
    inputs = stages.load_inputs(config_path)
    t1 = time.perf_counter()
    results = [stages.compute_block(inputs, b) for b in stages.plan_blocks(inputs)]
    t2 = time.perf_counter()
    return write_run(inputs, results, {"ingest_s": t1 - t0, "damage_loss_s": t2 - t1})
