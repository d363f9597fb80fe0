"""The run as a sequence of stages, shared by the plain library path and the Prefect flow.

:func:`execute` reads as the pipeline: hazard (compute mode) -> damage and loss ->
event-based portfolio -> screening and what-if -> store.  Each stage returns a frozen
product (:mod:`quakefolio.pipeline.stages.products`); block stages are mapped over blocks with
small arguments (:mod:`quakefolio.pipeline.stages.blocks`).  An *executor* decides how a stage
runs: :class:`SequentialExecutor` in this thread, or
:class:`quakefolio.pipeline.flow.PrefectExecutor` as Prefect tasks (on threads or on Dask).
"""
from __future__ import annotations

import gc
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

from quakefolio.core.errors import InputError, OutputError
from quakefolio.pipeline import progress
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.io.cache import digest, fragility_class_digests
from quakefolio.pipeline.io.coordinates import Positions, with_coordinates
from quakefolio.pipeline.io.relpaths import relative_paths
from quakefolio.pipeline.io.run_inputs import run_input_frames
from quakefolio.pipeline.io.output_folder import prepare_output_folder
from quakefolio.pipeline.io.store import RunWriter, new_run_id
from quakefolio.pipeline.io.tables import TABLES, units_for
from quakefolio.pipeline.io.versions import package_versions
from quakefolio.pipeline.reuse import (FROM_CACHE, _write_beside_report, _write_manifest, complete_key,
                                      record_complete_run)
from quakefolio.pipeline.stages import blocks, spectrum, whatif
from quakefolio.pipeline.stages import events as ps
from quakefolio.pipeline.stages import hazard as hs
from quakefolio.pipeline.stages.damage import combine_damage, plan_blocks
from quakefolio.pipeline.stages.inputs import load_inputs, stage_cache, with_hazard
from quakefolio.pipeline.stages.products import CacheCounts, EventProduct, RunInputs, WhatIfProduct
from quakefolio.pipeline.stages.regions import combination_record, site_input_record
from quakefolio.pipeline.stages.sites import hazard_sites_table, source_faults_table

__all__ = ["every_stage_cached", "FROM_CACHE", "execute", "SequentialExecutor", "write_run", "run_pure",
           "inputs_digest", "package_versions",
           "StageError", "stage_guard"]


def inputs_digest(inputs):
    """sha256 over the input files' digests and the resolved config of ``inputs`` (a RunInputs).

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        Validated run inputs (the digest was computed when they were read,
        :func:`quakefolio.pipeline.stages.inputs.inputs_digest`).

    Returns
    -------
    str
        64 hex characters.
    """
    return inputs.inputs_sha256


class StageError(RuntimeError):
    """A stage failed for a reason other than a user-input error; names the stage and cause."""

    def __init__(self, stage, cause, config_path):
        self.stage, self.cause = stage, cause
        super().__init__(f"stage '{stage}' failed: {type(cause).__name__}: {cause} (run config: {config_path})")


def stage_guard(name, config_path, call):
    """Run ``call()``; wrap unexpected exceptions in :class:`StageError` (user-input errors pass).

    Parameters
    ----------
    name : str
        Stage name.
    config_path : str
        Named in the error.
    call : callable
        No arguments.

    Returns
    -------
    object
        What ``call`` returns.
    """
    try:
        return call()
    except (InputError, StageError, KeyboardInterrupt):
        raise
    except Exception as exc:  # noqa: BLE001 - re-raised with the stage named
        raise StageError(name, exc, config_path) from exc


class SequentialExecutor:
    """Runs stage functions in this thread (the plain library path).

    ``one(name, fn, *args)`` runs a stage once; ``many(name, fn, ref, items)`` runs a
    block task ``fn(ref, item)`` per item, in order.
    """

    config_path = None
    #: what the manifest's ``orchestration`` says
    orchestration = "plain: stages in this process, no Prefect"

    def one(self, name, fn, *args):
        """Run a stage once, in this thread.

        Parameters
        ----------
        name : str
            Stage name (named in a :class:`StageError`).
        fn : callable
            The stage function.
        *args
            Its arguments.

        Returns
        -------
        object
            What ``fn(*args)`` returns.
        """
        return stage_guard(name, self.config_path, lambda: fn(*args))

    def many(self, name, fn, ref, items):
        """Run the block task ``fn(ref, item)`` per item, in order, in this thread.

        Parameters
        ----------
        name : str
            Stage name; also the progress bar's label.
        fn : callable
            Block task taking ``(ref, item)`` (:mod:`quakefolio.pipeline.stages.blocks`).
        ref : quakefolio.pipeline.stages.products.RunRef
            The run reference.
        items : list
            The blocks.

        Returns
        -------
        list
            Results in the order of ``items``.
        """
        progress.stage(name, len(items))
        out = []
        for item in items:
            out.append(stage_guard(name, self.config_path, lambda i=item: fn(ref, i)))
            progress.advance(name)
        return out


class _Clock:
    """Wall time per stage [s] (the manifest's ``timings_s``)."""

    def __init__(self):
        self.timings = {}

    def __call__(self, name, since):
        self.timings[name] = time.perf_counter() - since


def _site_counts(stage, parts):
    return CacheCounts.of(stage, sum(p.from_cache for p in parts), sum(p.computed for p in parts))


def run_hazard(inputs, ref, executor, work, clock):
    """Compute-mode hazard: curves per site block, logic-tree statistics, disaggregation, conditional spectrum.

    Parameters
    ----------
    inputs : RunInputs
    ref : RunRef
    executor : SequentialExecutor or PrefectExecutor
    work : Path
        Work folder for files other processes read (:func:`quakefolio.pipeline.stages.blocks.work_folder`).
    clock : callable(name, since)

    Returns
    -------
    (RunInputs, RunRef, CacheCounts)
        The inputs with the hazard, the reference to them, and the cache counts.
    """
    hs.GROUND_MOTION_MEMO.clear()
    try:
        return _run_hazard_stages(inputs, ref, executor, work, clock)
    finally:  # the values kept for the disaggregation and the spectrum are not needed after them
        hs.GROUND_MOTION_MEMO.clear()


def _run_hazard_stages(inputs, ref, executor, work, clock):
    """The stages of :func:`run_hazard`."""
    t = time.perf_counter()
    site_blocks = hs.site_blocks(len(inputs.hazard.site_id), inputs.config.execution.site_block_size)
    parts = executor.many("hazard-block", blocks.hazard_task, ref, site_blocks)
    model, hazard = executor.one("hazard-statistics", hs.combine_hazard, inputs.hazard_model, inputs.hazard, parts)
    inputs = with_hazard(inputs, model, hazard)
    ref = blocks.publish_hazard(ref, inputs, work)
    counts = _site_counts("hazard_sites", parts)
    clock("hazard_s", t)
    if model.disaggregation:
        t = time.perf_counter()
        parts = executor.many("disaggregation-block", blocks.disagg_task, ref, site_blocks)
        model = executor.one("disaggregation-combine", hs.combine_disaggregation, model, hazard, parts)
        inputs = with_hazard(inputs, model, hazard)
        blocks.register(inputs, ref)
        counts = counts + _site_counts("disaggregation_sites", parts)
        clock("disaggregation_s", t)
    if spectrum.conditioning_ims(inputs.config):
        t = time.perf_counter()
        parts = executor.many("conditional-spectrum-block", blocks.spectrum_task, ref, site_blocks)
        model = executor.one("conditional-spectrum-combine", spectrum.combine_spectrum, model, hazard, parts)
        inputs = with_hazard(inputs, model, hazard)
        blocks.register(inputs, ref)
        counts = counts + _site_counts("spectrum_sites", parts)
        clock("conditional_spectrum_s", t)
    return inputs, ref, counts


def run_damage(inputs, ref, executor, clock):
    """Damage and loss per block of unique (site, class) pairs; the asset tables.

    Pairs found in the content cache are left out of the blocks
    (:func:`quakefolio.pipeline.stages.damage.plan_blocks`).

    Parameters
    ----------
    inputs : RunInputs
        With hazard curves.
    ref : RunRef
        Reference the block tasks resolve the inputs by.
    executor : SequentialExecutor or PrefectExecutor
        How the stage's tasks run.
    clock : callable(name, since)
        Records the stage's wall time [s].

    Returns
    -------
    (DamageProduct, CacheCounts)
    """
    t = time.perf_counter()
    plan = plan_blocks(inputs)
    results = executor.many("damage-and-loss-block", blocks.damage_task, ref, list(plan.blocks))
    damage = executor.one("damage-and-loss-tables", combine_damage, inputs, plan, results)
    clock("damage_loss_s", t)
    return damage, plan.counts or CacheCounts()


def run_events(inputs, ref, executor, clock):
    """The event-based portfolio stage (whole-stage cache), or None when it is off.

    Parameters
    ----------
    inputs : RunInputs
        With the computed hazard (compute mode).
    ref : RunRef
        Reference the event tasks resolve the inputs by.
    executor : SequentialExecutor or PrefectExecutor
        How the stage's tasks run.
    clock : callable(name, since)
        Records the stage's wall time [s].

    Returns
    -------
    (EventProduct or None, EventModel or None, CacheCounts)
        The event model is None when the stage is off or read from the cache.
    """
    if not inputs.config.portfolio.event_based:
        return None, None, CacheCounts()
    t = time.perf_counter()
    cache = stage_cache(inputs)
    key = ps.event_cache_key(inputs)
    cached = cache.get_tables("events", key)
    em = None
    if cached is not None:
        events = EventProduct(*cached, from_cache=True)
    else:
        em = executor.one("event-set", ps.prepare_events, inputs)
        blocks.register_events(ref, em)
        chunks = executor.many("event-loss-block", blocks.event_task, ref, ps.event_chunks(em))
        tables, checks = executor.one("portfolio-aggregate", ps.combine_events, em, inputs, chunks)
        cache.put_tables("events", key, tables, checks)
        events = EventProduct(tables, checks)
    clock("event_based_s", t)
    return events, em, CacheCounts.of("event_stage", events.from_cache, not events.from_cache)


def run_whatif(inputs, damage, events, em, executor, clock):
    """Collapse-risk screening and retrofit alternatives (whole-stage cache).

    Parameters
    ----------
    inputs : RunInputs
        With hazard curves.
    damage : DamageProduct
        The damage stage's product (its per-pair results).
    events : EventProduct or None
        The event-based stage's product, if it ran.
    em : EventModel or None
        The event model, if prepared in this run (else prepared again when needed).
    executor : SequentialExecutor or PrefectExecutor
        How the stage's tasks run.
    clock : callable(name, since)
        Records the stage's wall time [s].

    Returns
    -------
    (WhatIfProduct, CacheCounts)
    """
    t = time.perf_counter()
    cache = stage_cache(inputs)
    key = digest("screening-and-what-if", inputs.inputs_sha256)  # every input file and setting
    cached = cache.get_tables("whatif", key)
    if cached is None:
        portfolio = None if events is None else (events.tables, events.checks)
        tables = executor.one("screening-and-what-if", whatif.evaluate, inputs, damage.pair_results(), portfolio, em)
        cache.put_tables("whatif", key, tables, {})
        product = WhatIfProduct(tables)
    else:
        product = WhatIfProduct(cached[0], from_cache=True)
    clock("screening_whatif_s", t)
    return product, CacheCounts.of("screening_and_what_if", product.from_cache, not product.from_cache)


def execute(inputs, executor, *, stages_to_run="all"):
    """The run, stage by stage; ``executor`` decides how (in this thread or as Prefect tasks).

    Parameters
    ----------
    inputs : RunInputs
        From :func:`quakefolio.pipeline.stages.load_inputs`.
    executor : SequentialExecutor or quakefolio.pipeline.flow.PrefectExecutor
    stages_to_run : {"all", "hazard"}
        ``"hazard"`` writes the hazard tables only.

    Returns
    -------
    Path
        The run folder.

    Notes
    -----
    The objects alive when the run starts (modules, Prefect's state in a flow run, the
    inputs) are moved out of the cyclic garbage collector's reach for the run
    (``gc.freeze``, CPython's permanent generation; ``gc.unfreeze`` at the end), so that its
    full collections, which the run's allocations trigger several times, do not traverse
    them again each time: they are alive throughout the run anyway, and reference counting
    still frees them.  With Prefect imported that is about twice as many objects as without.
    """
    gc.freeze()
    try:
        return _execute(inputs, executor, stages_to_run)
    finally:
        gc.unfreeze()


def _execute(inputs, executor, stages_to_run):
    """The body of :func:`execute`."""
    started = time.perf_counter()
    executor.config_path = str(inputs.config.path)
    prepare_output_folder(inputs.config.output.folder)  # checked again, created and marked before any write
    clock, counts = _Clock(), CacheCounts()
    clock.timings.update(getattr(inputs, "timings", None) or {})  # ingest_s: reading and checking the inputs
    damage = events = extra = None
    ref = blocks.register(inputs)
    with blocks.work_folder(inputs) as work:
        if inputs.hazard_model is not None:
            inputs, ref, c = run_hazard(inputs, ref, executor, work, clock)
            counts += c
        if stages_to_run == "all":
            damage, c = run_damage(inputs, ref, executor, clock)
            counts += c
            # the what-if reruns the event stage's events: their fields are kept for it in this process
            ps.FIELD_MEMO.clear(enabled=bool(inputs.config.scenario.alternatives))
            try:
                events, em, c = run_events(inputs, ref, executor, clock)
                counts += c
                extra, c = run_whatif(inputs, damage, events, em, executor, clock)
                counts += c
            finally:
                ps.FIELD_MEMO.clear()
        run = executor.one("store-run", write_run, inputs, damage, events, extra, clock.timings, counts, started,
                           getattr(executor, "orchestration", None))
    try:  # marks that every stage's result is now in the cache, and this run's tables (see every_stage_cached)
        record_complete_run(inputs, stages_to_run, run, () if damage is None else damage.warnings)
    except (OSError, OutputError):
        pass  # the run is written; a later run of the same inputs goes through the flow again
    return run


def every_stage_cached(inputs, stages_to_run="all"):
    """True if a run of these inputs (same files, settings and code) completed and the cache is on.

    Every stage's result of such a run is in the content cache (a stage stores its result
    before the run is written), so a new run computes nothing; the CLI then writes it
    without a Prefect flow run (:data:`FROM_CACHE`).  A cache entry that has gone since (or
    fails its digest check) is simply computed again, in this process.

    Parameters
    ----------
    inputs : RunInputs
        As read by :func:`quakefolio.pipeline.stages.load_inputs`.
    stages_to_run : {"all", "hazard"}

    Returns
    -------
    bool
    """
    return stage_cache(inputs).get("complete-runs", complete_key(inputs, stages_to_run)) is not None


def _hazard_frames(inputs):
    frames = {
        "hazard_sites": hazard_sites_table(inputs),
        "site_hazard": hs.site_hazard_table(inputs),
        "hazard_at_return_periods": hs.hazard_at_return_periods_table(inputs),
    }
    model = inputs.hazard_model
    if model is not None:
        frames["source_faults"] = source_faults_table(model)
    if model is not None and model.disagg is not None:
        frames["disaggregation"], frames["disaggregation_summary"] = hs.disaggregation_frames(
            model, inputs.hazard, inputs.config.hazard.return_periods_yr)
    if model is not None and model.spectrum_sums is not None:
        frames["conditional_mean_spectrum"] = spectrum.spectrum_frame(model, inputs.hazard, inputs.config)
    return frames


def _manifest(inputs, run_id, stages_written, events, counts, timings, writer, frames, warnings, orchestration):
    cfg = inputs.config
    currency = cfg.scenario.currency
    model = inputs.hazard_model
    manifest = {
        "run_id": run_id,
        "created_utc": run_id[:16],
        "caution": CAUTION,
        "scenario": cfg.scenario.name,
        "stages": stages_written,
        "inputs": dict(inputs.input_hashes),
        "inputs_sha256": inputs.inputs_sha256,
        "config": cfg.resolved(),
        "packages": package_versions(),
        "seed": cfg.portfolio.seed if events is not None else None,
        "cross_checks": None if events is None else events.checks,
        "cache": (counts or CacheCounts()).as_dict(),
        "timings_s": {k: round(v, 4) for k, v in timings.items()},
        "orchestration": orchestration,
        "row_counts": dict(writer.row_counts),
        "units": {name: units_for(name, currency, _column_names(frame)) for name, frame in frames.items()},
        "hazard_ims_interpolated": sorted(inputs.hazard.interpolated),
        "fragility_classes": fragility_class_digests(inputs.library),
        "hazard_sites": len(inputs.hazard.site_id),
        "warnings": list(warnings),
    }
    if model is not None:
        manifest["hazard_logic_tree"] = {
            "source_branches": [{"id": i, "weight": w, "ruptures": len(s.ruptures), "sources": s.sources}
                                for i, w, s in model.source_branches],
            "gmm_branches": [{"id": i, "weight": w} for i, w, _ in model.gmm_branches],
            "ims": model.ims,
            "region_gmm_branches": {r: [{"id": i, "weight": w} for i, w, _ in rows]
                                    for r, rows in model.region_branches.items()},
            "fractile_combinations": combination_record(model, cfg),
        }
        manifest["site_inputs"] = site_input_record(model)
    return relative_paths(manifest, Path(cfg.path).parent)  # no local folder of this machine in the outputs


def write_run(inputs, damage=None, events=None, extra=None, timings=None, counts=None, started=None,
              orchestration=None):
    """Assemble every table, write the run folder atomically, return its path.

    The manifest's ``timings_s`` holds the wall time [s] of every stage: ``ingest_s``
    (reading and checking the inputs), the computing stages, ``store_s`` (the tables),
    ``report_s`` (drawn from the tables in memory while they are written, so it overlaps
    ``store_s``) and ``total_s`` (ingest to the committed folder).

    Parameters
    ----------
    inputs : RunInputs
        With hazard.
    damage : DamageProduct or None
        None writes the hazard tables only (``quakefolio hazard``).
    events : EventProduct or None
        The event-based stage, if it ran.
    extra : WhatIfProduct or None
        Screening and what-if tables.
    timings : dict stage -> seconds
    counts : CacheCounts or None
    started : float or None
        ``time.perf_counter()`` when the run's stages started (for ``total_s``).
    orchestration : str or None
        How the stages ran (the manifest's ``orchestration``).

    Returns
    -------
    Path
        The committed run folder.
    """
    t0 = time.perf_counter()
    cfg = inputs.config
    currency = cfg.scenario.currency
    frames = _hazard_frames(inputs)
    warnings = list(inputs.warnings)
    if damage is not None:
        frames.update(damage.tables)
        warnings += list(damage.warnings)
    if events is not None:
        frames.update(events.tables)
    if extra is not None:
        frames.update(extra.tables)
    # the run stores the inputs it used (with the columns it breaks its results down by)
    frames.update(run_input_frames(inputs.exposure, inputs.library, extra_columns=cfg.output.breakdown_columns))
    frames = _located(inputs, frames)
    output = cfg.output.folder
    writer = RunWriter(output, new_run_id(output, inputs.inputs_sha256))  # claims a free run id
    run_id = writer.run_id
    provenance = {"run_id": run_id, "inputs_sha256": inputs.inputs_sha256,
                  "quakefolio_version": package_versions()["quakefolio"], "currency": currency, "caution": CAUTION}
    try:
        timings = dict(timings or {})
        manifest = _manifest(inputs, run_id, "hazard" if damage is None else "all", events, counts, timings, writer,
                             frames, warnings, orchestration)
        _write_beside_report(writer, manifest, timings, started, t0,  # the report drawn from the tables in memory
                             lambda: _write_tables(writer, frames, currency, provenance, cfg.execution.max_workers),
                             report=cfg.output.report, tables=frames, cache=stage_cache(inputs))
        manifest["row_counts"] = dict(writer.row_counts)
        _write_manifest(writer, manifest, timings, started)
        return writer.commit()
    except BaseException:
        writer.abort()
        raise


def _located(inputs, frames):
    """Every table with ``lon`` and ``lat`` [deg] of its asset or hazard site appended (io.coordinates)."""
    ex, hz = inputs.exposure, inputs.hazard
    assets = Positions.of(ex.asset_id, ex.lon.to_numpy(dtype=float), ex.lat.to_numpy(dtype=float))
    sites = Positions.of(hz.site_id, hz.lon, hz.lat)
    return {name: with_coordinates(frame, assets, sites) for name, frame in frames.items()}


def _write_tables(writer, frames, currency, provenance, workers):
    """Write every table, ``workers`` at a time (Parquet encoding and compression run outside the GIL).

    Every file is written whole by one thread; an error is raised once every write has
    ended (the caller then removes the partial folder).
    """
    def write(name, frame):
        writer.write_table(name, frame, units=units_for(name, currency, _column_names(frame)),
                           description=TABLES[name]["description"], provenance=provenance)

    with ThreadPoolExecutor(max_workers=max(1, int(workers)), thread_name_prefix="quakefolio-store") as pool:
        futures = [pool.submit(write, name, frame) for name, frame in frames.items()]
        for future in futures:
            future.result()


def _column_names(frame):
    """Column names of a DataFrame, Arrow table or ChunkedTable."""
    if hasattr(frame, "column_names"):
        return list(frame.column_names)
    if hasattr(frame, "schema"):
        return list(frame.schema.names)
    return [str(c) for c in frame.columns]


def run_pure(config_path, stages_to_run="all", orchestration=None):
    """The whole run without Prefect (same stage functions, sequential).

    Parameters
    ----------
    config_path : str, Path or RunInputs
    stages_to_run : {"all", "hazard"}
    orchestration : str, optional
        What the manifest says about how the stages ran (default: the plain path's).

    Returns
    -------
    Path
        The run folder.
    """
    inputs = config_path if isinstance(config_path, RunInputs) else load_inputs(config_path)
    executor = SequentialExecutor()
    if orchestration:
        executor.orchestration = orchestration
    return execute(inputs, executor, stages_to_run=stages_to_run)
