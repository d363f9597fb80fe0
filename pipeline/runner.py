"""Writing a run and the pure-library path (no Prefect) used by tests and benchmarks."""
from __future__ import annotations

import hashlib
import json
import platform
import time
from importlib import metadata

from quakefolio.pipeline import progress, stages
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.store import RunWriter, new_run_id
from quakefolio.pipeline.tables import TABLES, units_for

__all__ = ["execute", "SequentialExecutor", "write_run", "run_pure", "inputs_digest", "package_versions"]

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


def fragility_class_digests(library):
    """sha256 per building class of its resolved parameters (to attribute changes between runs)."""
    out = {}
    for code, dss in sorted(library.classes.items()):
        blob = json.dumps({"im": dss.im, "names": list(dss.names), "medians": dss.medians.tolist(),
                           "betas": dss.betas.tolist(), "mdr": dss.mean_damage_ratio.tolist(),
                           "cov": dss.cov.tolist(), "collapse_index": dss.collapse_index}, sort_keys=True)
        out[code] = hashlib.sha256(blob.encode()).hexdigest()
    return out


def inputs_digest(inputs):
    """sha256 over the input files' digests and the resolved config."""
    blob = json.dumps({"inputs": inputs.input_hashes, "config": inputs.config.resolved()}, sort_keys=True)
    return hashlib.sha256(blob.encode()).hexdigest()


class StageError(RuntimeError):
    """A stage failed for a reason other than a user-input error; names the stage and cause."""

    def __init__(self, stage, cause, config_path):
        self.stage, self.cause = stage, cause
        super().__init__(f"stage '{stage}' failed: {type(cause).__name__}: {cause} (run config: {config_path})")


def stage_guard(name, config_path, call):
    """Run ``call()``; wrap unexpected exceptions in :class:`StageError` (user-input errors pass)."""
    from quakefolio.core.errors import InputError

    try:
        return call()
    except (InputError, StageError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - re-raised with the stage named
        raise StageError(name, exc, config_path) from exc


class SequentialExecutor:
    """Runs stage functions in this thread (the pure-library path)."""

    config_path = None

    def one(self, name, fn, *args):
        return stage_guard(name, self.config_path, lambda: fn(*args))

    def many(self, name, fn, arglist):
        progress.stage(name, len(arglist))
        out = []
        for args in arglist:
            out.append(stage_guard(name, self.config_path, lambda a=args: fn(*a)))
            progress.advance(name)
        return out


def execute(inputs, executor, *, stages_to_run="all"):
    """The run, stage by stage; ``executor`` decides how (in this thread or as Prefect tasks).

    Stages: hazard (compute mode: curves per site block, logic-tree statistics,
    disaggregation per site block) -> damage and loss per block of (site, class) pairs
    -> store.  With ``stages_to_run="hazard"`` only the hazard tables are written.
    Returns the run folder.
    """
    from quakefolio.pipeline import hazard_stage as hs

    timings = {}
    cfg = inputs.config
    executor.config_path = str(cfg.path)
    model = inputs.hazard_model
    t = time.perf_counter()
    if model is not None:
        blocks = hs.site_blocks(len(inputs.hazard.site_id), cfg["execution"]["site_block_size"])
        parts = executor.many("hazard-block", hs.hazard_block, [(model, inputs.hazard, b) for b in blocks])
        executor.one("hazard-statistics", hs.combine_hazard, model, inputs.hazard, blocks, parts)
        timings["hazard_s"] = time.perf_counter() - t
        if model.disaggregation:
            t = time.perf_counter()
            rps = cfg["hazard"]["return_periods_yr"]
            parts = executor.many("disaggregation-block", hs.disagg_block,
                                  [(model, inputs.hazard, rps, b) for b in blocks])
            executor.one("disaggregation-combine", hs.combine_disaggregation, model, inputs.hazard, blocks, parts)
            timings["disaggregation_s"] = time.perf_counter() - t
    results = portfolio = extra = None
    if stages_to_run == "all":
        t = time.perf_counter()
        results = executor.many("damage-and-loss-block", stages.compute_block,
                                [(inputs, b) for b in stages.plan_blocks(inputs)])
        timings["damage_loss_s"] = time.perf_counter() - t
        if cfg["portfolio"]["event_based"]:
            from quakefolio.pipeline import portfolio_stage as ps

            t = time.perf_counter()
            key = ps.event_cache_key(inputs)
            portfolio = ps.load_cached(inputs.cache, key)
            from_cache = portfolio is not None
            if not from_cache:
                em = executor.one("event-set", ps.prepare_events, inputs)
                chunks = executor.many("event-loss-block", ps.event_chunk, [(em, c) for c in ps.event_chunks(em)])
                portfolio = executor.one("portfolio-aggregate", ps.combine_events, em, inputs, chunks)
                ps.save_cached(inputs.cache, key, portfolio)
            inputs.cache.count("event_stage", hits=int(from_cache), misses=int(not from_cache))
            timings["event_based_s"] = time.perf_counter() - t
        from quakefolio.pipeline import whatif

        t = time.perf_counter()
        from quakefolio.pipeline import portfolio_stage as ps
        from quakefolio.pipeline.cache import digest

        key = digest("screening-and-what-if", inputs_digest(inputs))  # every input file and setting
        cached = ps.load_cached(inputs.cache, key, kind="whatif")
        if cached is None:
            extra = executor.one("screening-and-what-if", whatif.evaluate, inputs, results, portfolio)
            ps.save_cached(inputs.cache, key, (extra, {}), kind="whatif")
        else:
            extra = cached[0]
        inputs.cache.count("screening_and_what_if", hits=int(cached is not None), misses=int(cached is None))
        timings["screening_whatif_s"] = time.perf_counter() - t
    return executor.one("store-run", write_run, inputs, results, timings, portfolio, extra)


def write_run(inputs, results, timings, portfolio=None, extra=None):
    """Assemble every table, write the run folder atomically, return its path.

    ``results`` None writes the hazard tables only (``quakefolio hazard``); ``portfolio``
    is the (tables, cross-checks) pair of the event-based stage, if it ran; ``extra`` a
    dict of further tables (screening and what-if), if any.
    """
    t0 = time.perf_counter()
    cfg = inputs.config
    currency = cfg["scenario"]["currency"]
    frames = {
        "site_hazard": stages.site_hazard_table(inputs),
        "hazard_at_return_periods": stages.hazard_at_return_periods_table(inputs),
    }
    model = inputs.hazard_model
    if model is not None and model.disagg is not None:
        from quakefolio.pipeline.hazard_stage import disaggregation_frames

        frames["disaggregation"], frames["disaggregation_summary"] = disaggregation_frames(
            model, inputs.hazard, cfg["hazard"]["return_periods_yr"])
    if results is not None:
        frames.update(stages.build_tables(inputs, results))
    checks = None
    if portfolio is not None:
        frames.update(portfolio[0])
        checks = portfolio[1]
    if extra:
        frames.update(extra)
    from quakefolio.pipeline.run_inputs import run_input_frames  # the run stores the inputs it used

    frames.update(run_input_frames(inputs.exposure, inputs.library))
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
            "stages": "hazard" if results is None else "all",
            "inputs": inputs.input_hashes,
            "inputs_sha256": digest,
            "config": cfg.resolved(),
            "packages": versions,
            "seed": cfg["portfolio"]["seed"] if portfolio is not None else None,
            "cross_checks": checks,
            "cache": inputs.cache.stats() if inputs.cache is not None else {},
            "timings_s": {k: round(v, 4) for k, v in timings.items()},
            "row_counts": dict(writer.row_counts),
            "units": {name: units_for(name, currency) for name in frames},
            "hazard_ims_interpolated": sorted(inputs.hazard.interpolated),
            "fragility_classes": fragility_class_digests(inputs.library),
            "hazard_sites": len(inputs.hazard.site_id),
            "warnings": list(inputs.warnings),
        }
        if model is not None:
            manifest["hazard_logic_tree"] = {
                "source_branches": [{"id": i, "weight": w, "ruptures": len(s.ruptures), "sources": s.sources}
                                    for i, w, s in model.source_branches],
                "gmm_branches": [{"id": i, "weight": w} for i, w, _ in model.gmm_branches],
                "ims": model.ims,
            }
        writer.write_text("manifest.json", json.dumps(manifest, indent=2, sort_keys=True, default=float) + "\n")
        if cfg["output"]["report"]:
            from quakefolio.pipeline.report import write_report  # lazy: the report module imports this one

            write_report(writer.partial, writer.partial / "report.html")
        return writer.commit()
    except BaseException:
        writer.abort()
        raise


def run_pure(config_path, stages_to_run="all"):
    """The whole run without Prefect (same stage functions, sequential)."""
    inputs = config_path if isinstance(config_path, stages.Inputs) else stages.load_inputs(config_path)
    return execute(inputs, SequentialExecutor(), stages_to_run=stages_to_run)
