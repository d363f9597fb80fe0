"""Block tasks as they run on a Dask worker: small arguments in, inputs rebuilt on the worker.

On a cluster the driver does not ship the run's inputs (exposure, hazard model, event
set) with every block.  A task receives a :class:`WorkRef` (the config path and the
digest of the inputs the driver validated) plus its block, and the worker process
rebuilds what it needs once per run:

* :func:`stages.load_inputs` from the config path, memoised per process by
  ``(config path, inputs digest)``; a worker whose files differ from the driver's (the
  digest does not match) fails the task instead of computing on other inputs;
* in compute mode, the combined hazard from the ``.npy`` file of branch curves the
  driver wrote to the run's work folder, passed through the same
  :func:`hazard_stage.combine_hazard` the driver used;
* the event model from :func:`portfolio_stage.prepare_events` (deterministic in the
  config and seed).

Then the unchanged stage function runs on the rebuilt objects, so a block gives the
same numbers on a worker as in a thread of the driver.  Workers must see the input files
and the output folder under the same paths as the driver (a shared file system).

The driver side is :class:`RemoteBlocks`, a mixin for executors: it swaps each block
stage for its worker function and small arguments, writes what workers must read, and
folds the workers' cache statistics back into the run's.  No Prefect here:
:class:`quakefolio.pipeline.orchestration.DaskExecutor` adds the Prefect tasks.
"""
from __future__ import annotations

import os
import shutil
import threading
import uuid
from collections import OrderedDict
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from quakefolio.pipeline import hazard_stage as hs
from quakefolio.pipeline import portfolio_stage as ps
from quakefolio.pipeline import stages

__all__ = ["WorkRef", "WithCounts", "RemoteBlocks", "hazard_block", "disagg_block", "damage_block", "event_chunk",
           "WORKER_CALLS", "clear_memo", "memo_runs"]

#: Runs whose inputs a worker process keeps in memory at once.
MEMO_RUNS = 2


@dataclass(frozen=True)
class WorkRef:
    """What a worker needs to rebuild a run's inputs: small and JSON-like."""

    config_path: str
    inputs_sha256: str
    hazard_file: str | None = None  # compute mode: branch curves (.npy) once combined by the driver


class _Entry:
    def __init__(self):
        self.lock = threading.Lock()
        self.inputs = None
        self.hazard_file = None
        self.event_model = None


_MEMO: OrderedDict = OrderedDict()
_MEMO_LOCK = threading.Lock()


def clear_memo():
    """Forget every memoised run of this process."""
    with _MEMO_LOCK:
        _MEMO.clear()


def memo_runs():
    """Config paths of the runs whose inputs this process holds (for diagnostics)."""
    with _MEMO_LOCK:
        return [config_path for config_path, _ in _MEMO]


def _entry(ref):
    key = (ref.config_path, ref.inputs_sha256)
    with _MEMO_LOCK:
        entry = _MEMO.get(key)
        if entry is None:
            entry = _MEMO[key] = _Entry()
            while len(_MEMO) > MEMO_RUNS:
                _MEMO.popitem(last=False)
        else:
            _MEMO.move_to_end(key)
    with entry.lock:  # threads of one worker load a run once
        if entry.inputs is None:
            from quakefolio.pipeline.runner import inputs_digest

            inputs = stages.load_inputs(ref.config_path)
            got = inputs_digest(inputs)
            if got != ref.inputs_sha256:
                raise RuntimeError(
                    f"the inputs of {ref.config_path} read on this worker (digest {got[:12]}) differ from the "
                    f"driver's ({ref.inputs_sha256[:12]}): a file changed during the run, or the worker sees "
                    "other files under the same paths")
            entry.inputs = inputs
        if ref.hazard_file is not None and entry.hazard_file != ref.hazard_file:
            inputs = entry.inputs
            curves = np.load(ref.hazard_file, allow_pickle=False)
            n_sites = len(inputs.hazard.site_id)
            hs.combine_hazard(inputs.hazard_model, inputs.hazard, [(0, n_sites)], [curves])
            entry.hazard_file = ref.hazard_file
    return entry


def _inputs(ref):
    return _entry(ref).inputs


@dataclass
class WithCounts:
    """A block result with the content-cache hits and misses it counted on the worker.

    The driver adds the counts to its own cache statistics (the run's manifest reports
    them), then hands ``value`` to the stage sequence.
    """

    value: object
    hits: dict = field(default_factory=dict)
    misses: dict = field(default_factory=dict)


class _CountingCache:
    """The worker's stage cache, with hit and miss counts kept per task."""

    def __init__(self, cache):
        self._cache = cache
        self.enabled = cache.enabled
        self.hits, self.misses = {}, {}

    def get(self, stage, key):
        return self._cache.get(stage, key)

    def put(self, stage, key, arrays):
        self._cache.put(stage, key, arrays)

    def count(self, stage, hits=0, misses=0):
        self.hits[stage] = self.hits.get(stage, 0) + hits
        self.misses[stage] = self.misses.get(stage, 0) + misses


def _counted(stage_fn, inputs, *args):
    """Run a hazard-stage function on a view of the model whose cache counts for this task only."""
    model = inputs.hazard_model
    if model.cache is None:
        return WithCounts(stage_fn(model, inputs.hazard, *args))
    counter = _CountingCache(model.cache)
    value = stage_fn(replace(model, cache=counter), inputs.hazard, *args)
    return WithCounts(value, counter.hits, counter.misses)


def hazard_block(ref, block):
    """:func:`hazard_stage.hazard_block` for one site block of the run ``ref``."""
    return _counted(hs.hazard_block, _inputs(ref), block)


def disagg_block(ref, return_periods, block):
    """:func:`hazard_stage.disagg_block` for one site block (needs the combined hazard)."""
    return _counted(hs.disagg_block, _inputs(ref), return_periods, block)


def damage_block(ref, block):
    """:func:`stages.compute_block` for one block of (site, class) pairs."""
    return stages.compute_block(_inputs(ref), block)


def event_chunk(ref, chunk):
    """:func:`portfolio_stage.event_chunk` for one chunk of event blocks."""
    entry = _entry(ref)
    with entry.lock:
        if entry.event_model is None:
            entry.event_model = ps.prepare_events(entry.inputs)
    return ps.event_chunk(entry.event_model, chunk)


def _model_of_inputs(args):
    return args[0].hazard_model


def _model_first(args):
    return args[0]


#: stage function -> (worker function, small arguments from the driver's arguments,
#: the hazard model to publish first or None).  The driver's in-memory objects are
#: replaced by the run reference; block and chunk descriptors travel as they are.
WORKER_CALLS = {
    hs.hazard_block: (hazard_block, lambda ref, args: (ref, args[2]), None),
    hs.disagg_block: (disagg_block, lambda ref, args: (ref, list(args[2]), args[3]), _model_first),
    stages.compute_block: (damage_block, lambda ref, args: (ref, args[1]), _model_of_inputs),
    ps.event_chunk: (event_chunk, lambda ref, args: (ref, args[1]), None),
}


class RemoteBlocks:
    """Executor mixin: block stages leave the driver as worker functions with small arguments.

    A block stage listed in :data:`WORKER_CALLS` is mapped as its worker function with a
    :class:`WorkRef` and its block; in compute mode the combined branch curves are first
    written once to ``<output>/.work/<id>/branch_curves-*.npy`` for the workers to read.
    Any other block stage is mapped with its arguments as they are (correct, but pickled
    per task) and its name recorded in :attr:`shipped_whole`.  Content-cache hits and
    misses counted on the workers are added to the run's statistics.  Use as a context
    manager, or call :meth:`close`, to remove the work folder.

    Put it before the executor class it extends:
    ``class DaskExecutor(RemoteBlocks, PrefectExecutor)``.
    """

    def __init__(self, inputs, config_path):
        super().__init__()
        from quakefolio.pipeline.runner import inputs_digest

        self.ref = WorkRef(config_path=str(Path(config_path).resolve()), inputs_sha256=inputs_digest(inputs))
        self.run_cache = getattr(inputs, "cache", None)  # worker cache counts are added here
        self.work_root = Path(inputs.config["output"]["folder"]).resolve() / ".work"
        self.work = None
        self.shipped_whole = []
        self._published = None  # (branch-curves array, path)

    def many(self, name, fn, arglist):
        call = WORKER_CALLS.get(fn)
        if call is None:
            self.shipped_whole.append(name)
            return super().many(name, fn, arglist)
        worker_fn, small_args, model_of = call
        out_args = []
        for args in arglist:
            model = model_of(args) if model_of is not None else None
            ref = self.ref if model is None else self._with_hazard(model)
            out_args.append(small_args(ref, args))
        return [self._unwrap(r) for r in super().many(name, worker_fn, out_args)]

    def _unwrap(self, result):
        if not isinstance(result, WithCounts):
            return result
        if self.run_cache is not None:
            for stage in set(result.hits) | set(result.misses):
                self.run_cache.count(stage, hits=result.hits.get(stage, 0), misses=result.misses.get(stage, 0))
        return result.value

    def _with_hazard(self, model):
        """The run reference with the combined branch curves written where workers can read them."""
        curves = model.branch_curves
        if curves is None:
            raise RuntimeError("block stages that need hazard curves ran before the curves were combined")
        if self._published is None or self._published[0] is not curves:
            if self.work is None:
                self.work = self.work_root / uuid.uuid4().hex
                self.work.mkdir(parents=True)
            path = self.work / f"branch_curves-{uuid.uuid4().hex[:8]}.npy"
            tmp = path.with_name(f".{path.name}.tmp")
            with open(tmp, "wb") as fh:
                np.save(fh, np.ascontiguousarray(curves), allow_pickle=False)
            os.replace(tmp, path)
            self._published = (curves, path)
        return replace(self.ref, hazard_file=str(self._published[1]))

    def close(self):
        """Remove this run's work folder (and ``.work`` itself when empty)."""
        if self.work is not None:
            shutil.rmtree(self.work, ignore_errors=True)
            self.work = None
            try:
                self.work_root.rmdir()
            except OSError:
                pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False
