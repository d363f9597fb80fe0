"""An unchanged rerun: the tables of a finished run of the same inputs and code, written again.

When a run of the same input files, settings and quakefolio code completed in the output
folder, every stage's result is in the content cache and so are the run's tables: the
run's Parquet files.  :func:`reuse_finished_run` writes the new run folder from that
earlier run (the *source run*) instead of running the stages and encoding the tables from
memory: every table is read with Arrow and written again with this run's provenance in its
schema metadata (run id; the same inputs digest, units and description), the manifest is
the source run's with this run's id, time, package versions, orchestration, cache counts
(every stage from the cache) and timings, and ``tables_from_run`` naming the source run; the
report is drawn again (its table-drawn sections from the content cache).  The folder is
written and committed like any other (:class:`quakefolio.pipeline.io.store.RunWriter`).

Neither scipy nor Prefect is imported on this path, and matplotlib only when the report
draws a figure that is not cached (the trend, while its numbers change): an unchanged demo
rerun costs reading the inputs, copying a few megabytes of tables and the report.

The source run is the one recorded with the cache's ``complete-runs`` entry of the inputs
(:func:`record_complete_run`); it is used only when it still exists, its tables have the size
and modification time recorded when it was written, its manifest names the same inputs digest
and stages, it holds exactly the files a run writes, and every table's provenance names that
run and digest.  Otherwise (an entry written before runs were
recorded, a removed or edited run) the caller runs the stages, every one from the cache.
"""
from __future__ import annotations

import json
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from quakefolio.core.errors import InputError
from quakefolio.pipeline.io.cache import StageCache, digest
from quakefolio.pipeline.io.claims import RUN_ID
from quakefolio.pipeline.io.relpaths import relative_paths
from quakefolio.pipeline.io.store import METADATA_KEY, RunWriter, new_run_id, read_manifest
from quakefolio.pipeline.io.versions import package_versions

__all__ = ["FROM_CACHE", "complete_key", "record_complete_run", "finished_source", "reuse_finished_run",
           "ReportThread"]

#: The manifest's ``orchestration`` of a run that needed no flow: every stage's result was in the cache.
FROM_CACHE = "none: every stage's result was in the content cache (no Prefect flow run)"

#: Files of a run folder besides its tables.
_OTHER_FILES = {"manifest.json", "report.html"}
#: Manifest ``timings_s`` entries that are not a computing stage.
_NOT_STAGES = {"ingest_s", "store_s", "report_s", "total_s"}


def _cache(inputs):
    return StageCache(inputs.config.output.folder, enabled=inputs.config.execution.cache)


def complete_key(inputs, stages_to_run):
    """Content-cache key of the record that a run of ``inputs`` completed (inputs digest, stages, code).

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        As read by :func:`quakefolio.pipeline.stages.load_inputs`.
    stages_to_run : {"all", "hazard"}
        The stages the run wrote.

    Returns
    -------
    str
        64 hex characters.
    """
    return digest("complete-run", inputs.inputs_sha256, stages_to_run)  # and the code version


def record_complete_run(inputs, stages_to_run, run, stage_warnings=()):
    """Record in the content cache that ``run`` completed for these inputs, stages and code.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        The run's inputs.
    stages_to_run : {"all", "hazard"}
        The stages the run wrote.
    run : pathlib.Path
        The committed run folder (its name is recorded: a later run may take its tables).
    stage_warnings : sequence of str
        Warnings the stages added to the manifest (besides the input warnings).

    Returns
    -------
    None
    """
    _cache(inputs).put("complete-runs", complete_key(inputs, stages_to_run),
                       {"done": np.ones(1, np.int8), "run": np.array(Path(run).name),
                        "files": np.array(json.dumps(_file_stamps(run))),
                        "stage_warnings": np.array(json.dumps([str(w) for w in stage_warnings]))})


def _file_stamps(run):
    """Size [bytes] and modification time [ns] of every table of a run folder: an edited table is not taken."""
    out = {}
    for path in Path(run).iterdir():
        if path.name.endswith(".parquet"):
            st = path.stat()
            out[path.name] = [st.st_size, st.st_mtime_ns]
    return out


def _stages_label(stages_to_run):
    return "hazard" if stages_to_run == "hazard" else "all"


def finished_source(inputs, stages_to_run="all"):
    """The recorded complete run of these inputs, stages and code, if it can be taken again.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        As read by :func:`quakefolio.pipeline.stages.load_inputs`.
    stages_to_run : {"all", "hazard"}
        The stages to write.

    Returns
    -------
    (pathlib.Path, dict, list of str) or None
        The source run folder, its manifest and the warnings its stages added; None when
        no run is recorded (or the cache is off) or the recorded one is gone, changed or
        not of these inputs.
    """
    entry = _cache(inputs).get("complete-runs", complete_key(inputs, stages_to_run))
    if entry is None or "run" not in entry:
        return None
    run_id = str(entry["run"])
    runs = Path(inputs.config.output.folder) / "runs"
    source = runs / run_id
    if not RUN_ID.fullmatch(run_id) or source.is_symlink() or not source.is_dir():
        return None
    try:
        manifest = read_manifest(source)
        stage_warnings = json.loads(str(entry["stage_warnings"]))
        if json.loads(str(entry["files"])) != _file_stamps(source):  # a table edited, added or removed since
            return None
    except (InputError, ValueError, KeyError, OSError):
        return None
    names = {p.name for p in source.iterdir()}
    tables = {n[:-len(".parquet")] for n in names if n.endswith(".parquet")}
    if (manifest.get("run_id") != run_id or manifest.get("inputs_sha256") != inputs.inputs_sha256
            or manifest.get("stages") != _stages_label(stages_to_run)
            or not isinstance(manifest.get("row_counts"), dict) or set(manifest["row_counts"]) != tables
            or not names <= _OTHER_FILES | {f"{t}.parquet" for t in tables}):
        return None
    return source, manifest, stage_warnings


class _NotReusable(Exception):
    """A table of the source run is not what its manifest says (then the stages run instead)."""


def _read_table(source, name, source_id, sha):
    """Table ``name`` of the source run (Arrow) and its quakefolio metadata, checked against the run and digest."""
    try:
        with pq.ParquetFile(source / f"{name}.parquet") as file:  # one file: without the dataset machinery
            table = file.read()
        meta = json.loads((table.schema.metadata or {}).get(METADATA_KEY, b"{}"))
    except (OSError, ValueError, pa.ArrowException) as exc:  # gone, unreadable or not Parquet: not taken
        raise _NotReusable(name) from exc
    if meta.get("run_id") != source_id or meta.get("inputs_sha256") != sha or meta.get("table") != name:
        raise _NotReusable(name)
    return table, meta


def _write_table(writer, name, table, meta):
    """Write a table of the source run into the new run, with the new run's id in its provenance."""
    provenance = {k: v for k, v in meta.items() if k not in ("table", "description", "units")}
    provenance["run_id"] = writer.run_id
    writer.write_table(name, table, units=meta.get("units", {}), description=meta.get("description", ""),
                       provenance=provenance)


def _manifest(inputs, source_manifest, stage_warnings, run_id, orchestration):
    """The source run's manifest for the new run (id, time, packages, cache counts, warnings, provenance)."""
    manifest = dict(source_manifest)
    manifest.update(
        run_id=run_id, created_utc=run_id[:16], orchestration=orchestration, packages=package_versions(),
        tables_from_run=source_manifest["run_id"],
        cache={k: {"computed": 0, "from_cache": int(v.get("computed", 0)) + int(v.get("from_cache", 0))}
               for k, v in (source_manifest.get("cache") or {}).items()},
        warnings=relative_paths([str(w) for w in inputs.warnings] + list(stage_warnings),
                                Path(inputs.config.path).parent),
    )
    return manifest


def _write_manifest(writer, manifest, timings, started):
    """Write ``manifest.json`` with ``timings_s`` rounded to 0.1 ms (and ``total_s`` when ``started`` is known).

    Shared by a run's store (``runner.write_run``) and a rerun that takes an earlier run's tables.
    """
    timings = dict(timings)
    if started is not None:
        timings["total_s"] = timings.get("ingest_s", 0.0) + time.perf_counter() - started
    manifest["timings_s"] = {k: round(v, 4) for k, v in timings.items()}
    writer.write_text("manifest.json", json.dumps(manifest, indent=2, sort_keys=True, default=float) + "\n")


def reuse_finished_run(inputs, stages_to_run="all", orchestration=FROM_CACHE):
    """Write a new run folder from the recorded complete run of the same inputs and code, or return None.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        As read by :func:`quakefolio.pipeline.stages.load_inputs`.
    stages_to_run : {"all", "hazard"}
        The stages to write.
    orchestration : str
        What the manifest says about how the stages ran.

    Returns
    -------
    pathlib.Path or None
        The committed run folder; None when no source run can be taken again (nothing is
        written then: run the stages).

    Notes
    -----
    ``timings_s`` holds ``ingest_s``, ``store_s`` (reading and writing the tables),
    ``report_s`` (drawn from the tables in memory while they are written, so it overlaps
    ``store_s``), ``total_s`` and 0 for every computing stage of the source run (none ran).
    """
    found = finished_source(inputs, stages_to_run)
    if found is None:
        return None
    source, source_manifest, stage_warnings = found
    started = time.perf_counter()
    cfg = inputs.config
    writer = RunWriter(cfg.output.folder, new_run_id(cfg.output.folder, inputs.inputs_sha256))
    try:
        timings = {"ingest_s": (getattr(inputs, "timings", None) or {}).get("ingest_s", 0.0)}
        timings.update({k: 0.0 for k in (source_manifest.get("timings_s") or {}) if k not in _NOT_STAGES})
        manifest = _manifest(inputs, source_manifest, stage_warnings, writer.run_id, orchestration)
        _write_all(writer, source, manifest, inputs, timings, started)
        if writer.row_counts != {k: int(v) for k, v in source_manifest["row_counts"].items()}:
            raise _NotReusable("row counts")
        _write_manifest(writer, manifest, timings, started)
        run = writer.commit()
    except _NotReusable:
        writer.abort()
        return None
    except BaseException:
        writer.abort()
        raise
    try:  # this run can be taken again as well (the source run may be removed later)
        record_complete_run(inputs, stages_to_run, run, stage_warnings)
    except (OSError, InputError):
        pass  # the run is written; a later run takes the source run again, or runs the stages
    return run


def _write_all(writer, source, manifest, inputs, timings, started):
    """Read the source run's tables, then write them and (in its own thread, meanwhile) the report."""
    cfg = inputs.config
    t0 = time.perf_counter()
    names = sorted(manifest["row_counts"])
    with ThreadPoolExecutor(max_workers=max(1, int(cfg.execution.max_workers)),
                            thread_name_prefix="quakefolio-store") as pool:
        read = dict(zip(names, pool.map(lambda n: _read_table(source, n, source.name, inputs.inputs_sha256), names)))

        def write():
            for future in [pool.submit(_write_table, writer, n, table, meta) for n, (table, meta) in read.items()]:
                future.result()

        _write_beside_report(writer, manifest, timings, started, t0, write, report=cfg.output.report,
                             tables={n: table for n, (table, _) in read.items()}, cache=_cache(inputs))


def _write_beside_report(writer, manifest, timings, started, t0, write, *, report, tables, cache):
    """Run ``write()`` (the tables) with, when ``report``, the report of the partial folder drawn meanwhile in its
    own thread from ``tables``; set ``timings`` ``store_s`` (since ``t0``) and ``report_s``.

    The manifest is written first, for the report to show (it lacks the row counts and the store's and the
    report's times until the caller writes it again).  Shared by a run's store and a rerun that takes an
    earlier run's tables.
    """
    thread = None
    if report:
        _write_manifest(writer, manifest, timings, started)
        thread = ReportThread(writer.partial, tables, cache)
        thread.start()
    try:
        write()
    finally:
        if thread is not None:
            thread.join()
    timings["store_s"] = time.perf_counter() - t0
    if thread is not None:
        thread.result()
        timings["report_s"] = thread.seconds


class ReportThread(threading.Thread):
    """Writes the report of a partial run folder from the tables in memory, in its own thread.

    Parquet encoding (in the store's threads) runs outside the GIL while the report's figures
    are drawn; :meth:`result` raises what the report raised.

    Parameters
    ----------
    folder : pathlib.Path
        The partial run folder (its ``manifest.json`` is written before the thread starts).
    frames : Mapping name -> DataFrame, pyarrow.Table or ChunkedTable
        The run's tables.
    cache : quakefolio.pipeline.io.cache.StageCache, optional
        The content cache (the report's table-drawn sections).
    """

    def __init__(self, folder, frames, cache=None):
        super().__init__(name="quakefolio-report", daemon=True)
        self.folder, self.frames, self.cache = folder, frames, cache
        self.error, self.seconds = None, 0.0

    def run(self):
        """Write ``report.html`` into the folder (an error is kept for :meth:`result`)."""
        from quakefolio.pipeline.report import write_report  # lazy: the report is a layer above the stages

        t = time.perf_counter()
        try:
            write_report(self.folder, self.folder / "report.html", tables=self.frames, cache=self.cache)
        except BaseException as exc:  # noqa: BLE001 - handed to the writing thread by result()
            self.error = exc
        self.seconds = time.perf_counter() - t

    def result(self):
        """Raise the report's error, if any.

        Returns
        -------
        None
        """
        if self.error is not None:
            raise self.error
