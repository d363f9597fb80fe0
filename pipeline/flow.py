"""The Prefect flow ``portfolio-risk``: the stages of :func:`quakefolio.pipeline.runner.execute`
as Prefect tasks.

Import this module only after :func:`quakefolio.pipeline.env.configure_prefect` has
set Prefect's environment (the CLI does it first thing).  Stages that run once (ingest,
combining blocks, writing the run) are tasks in the flow's process; block stages are
submitted to the flow's task runner with small arguments (a run reference and a block:
:mod:`quakefolio.pipeline.stages.blocks`), so the same executor serves a thread pool and a Dask
cluster.  Tasks use no cache policy and do not persist results (Prefect would pickle
large arrays); flow parameters stay small JSON.  The stage sequence is shared with the
plain library path, so both give identical tables.

What the flow costs per run is kept small: on the thread pool a stage's blocks go to a few
task runs (:data:`BATCHES_PER_WORKER` per worker thread, each running its share of the
blocks in order) rather than one task run per block, since every task run costs state
events and log records in this process and in the server; on Dask every block stays a task
run of its own (the cluster balances them).  The flow's parameters are not validated
(they are two strings this module passes).  :func:`run_flow` runs the flow in this process
without heartbeats: Prefect's heartbeat thread sleeps in steps of one second and the flow
run's end waits for it to wake (0.5 s on average, up to 1 s per run); a heartbeat serves to
mark a flow run whose process died, which nothing here acts on, and the run's own process
reports its end or its failure.
"""
from __future__ import annotations

import errno

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.settings import PREFECT_FLOWS_HEARTBEAT_FREQUENCY, temporary_settings
from prefect.task_runners import ThreadPoolTaskRunner

from quakefolio.pipeline import progress
from quakefolio.pipeline.runner import execute, stage_guard
from quakefolio.pipeline.stages.inputs import load_inputs

__all__ = ["portfolio_risk", "run_flow", "hand_over", "PrefectExecutor", "BATCHES_PER_WORKER"]

_TASK = dict(cache_policy=NO_CACHE, persist_result=False)


#: task runs per worker thread of a stage's blocks on the thread pool (a few, so that uneven blocks balance)
BATCHES_PER_WORKER = 2


#: stages that read or write files and may meet a transient I/O error: retried on OSError only
_IO_STAGES = {"ingest": 2, "store-run": 2}


#: errno values that a retry one second later does not cure (permissions, read-only or full disk)
_LASTING_ERRNOS = {errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOSPC, errno.EDQUOT}


def _retry_on_os_error(task, task_run, state):
    """Retry condition: only transient I/O errors (never a user-input error, a full or read-only disk)."""
    from quakefolio.core.errors import InputError

    try:
        state.result()
    except InputError:
        return False
    except OSError as exc:
        return exc.errno not in _LASTING_ERRNOS
    except Exception:  # noqa: BLE001 - anything else is not transient
        return False
    return False


class PrefectExecutor:
    """Runs each stage function as a Prefect task; ``many`` submits a block task per block.

    ``one(name, fn, *args)`` runs ``fn`` as a task in this process; ``many(name, fn, ref,
    items)`` submits ``fn(ref, item)`` per item to the flow's task runner (threads or Dask
    workers) and resolves every future (a failed block fails the flow).
    """

    config_path = None
    #: what the manifest's ``orchestration`` says
    orchestration = "Prefect flow portfolio-risk"

    def __init__(self, batches=None):
        self._tasks = {}
        #: task runs per block stage (None: one per block)
        self.batches = batches

    def _task(self, name, fn):
        key = (name, fn)
        if key not in self._tasks:
            extra = {}
            if name in _IO_STAGES:
                extra = dict(retries=_IO_STAGES[name], retry_delay_seconds=1,
                             retry_condition_fn=_retry_on_os_error)
            self._tasks[key] = task(fn, name=name, **_TASK, **extra)
        return self._tasks[key]

    def one(self, name, fn, *args):
        """Run a stage once, as a Prefect task in this process.

        Stages in ``_IO_STAGES`` are retried on ``OSError`` only.

        Parameters
        ----------
        name : str
            Stage (task) name.
        fn : callable
            The stage function.
        *args
            Its arguments.

        Returns
        -------
        object
            What ``fn(*args)`` returns.

        Raises
        ------
        quakefolio.pipeline.runner.StageError
            For anything but a user-input error (:func:`quakefolio.pipeline.runner.stage_guard`).
        """
        return stage_guard(name, self.config_path, lambda: self._task(name, fn)(*args))

    def many(self, name, fn, ref, items):
        """Submit the block task ``fn(ref, item)`` per item to the flow's task runner; resolve all.

        With :attr:`batches` set (the thread pool), the items go round-robin to at most
        that many task runs, each calling ``fn`` on its items in order; the results come
        back in the order of ``items`` all the same.

        Parameters
        ----------
        name : str
            Stage (task) name; also the progress bar's label.
        fn : callable
            Block task taking ``(ref, item)`` (:mod:`quakefolio.pipeline.stages.blocks`).
        ref : quakefolio.pipeline.stages.products.RunRef
            The run reference (small and picklable).
        items : list
            The blocks.

        Returns
        -------
        list
            Results in the order of ``items``; a failed block raises
            :class:`quakefolio.pipeline.runner.StageError` (the flow fails).
        """
        progress.stage(name, len(items))
        if self.batches and len(items) > self.batches:
            return self._many_batched(name, fn, ref, items)
        t = self._task(name, fn)
        futures = [t.submit(ref, item) for item in items]
        out = []
        for f in futures:  # resolve every future: a failure fails the flow
            out.append(stage_guard(name, self.config_path, f.result))
            progress.advance(name)
        return out

    def _many_batched(self, name, fn, ref, items):
        """``fn(ref, item)`` per item in :attr:`batches` task runs (items round-robin); results in item order."""
        t = self._task(name, _run_batch)
        n = int(self.batches)
        futures = [t.submit(fn, name, ref, items[k::n]) for k in range(n)]
        parts = [stage_guard(name, self.config_path, f.result) for f in futures]  # resolve every future
        out = [None] * len(items)
        for k, part in enumerate(parts):
            out[k::n] = part
        return out


def _run_batch(fn, name, ref, batch):
    """``fn(ref, item)`` for every item of ``batch``, in order (one task run of a block stage)."""
    out = []
    for item in batch:
        out.append(fn(ref, item))
        progress.advance(name)
    return out


@flow(name="portfolio-risk", persist_result=False, log_prints=False, validate_parameters=False)
def portfolio_risk(config_path: str, stages_to_run: str = "all") -> str:
    """Read inputs -> hazard (compute mode) -> damage and loss -> events -> what-if -> store.

    Parameters
    ----------
    config_path : str
        Run config file.
    stages_to_run : {"all", "hazard"}

    Returns
    -------
    str
        The run folder.
    """
    executor = PrefectExecutor()
    executor.config_path = config_path
    inputs = executor.one("ingest", _ingest, config_path)
    executor.batches = _batches(inputs)
    return str(execute(inputs, executor, stages_to_run=stages_to_run))


def _batches(inputs):
    """Task runs per block stage: a few per worker thread on the thread pool; None (one per block) elsewhere."""
    from prefect.context import FlowRunContext

    context = FlowRunContext.get()
    if context is None or not isinstance(getattr(context, "task_runner", None), ThreadPoolTaskRunner):
        return None
    return BATCHES_PER_WORKER * max(1, int(inputs.config.execution.max_workers))


#: inputs already read and validated by the caller in this process, by config path (taken once)
_READ = {}


def _ingest(config_path):
    """The inputs handed over by :func:`run_flow` (read once per run), else read them now."""
    given = _READ.pop(config_path, None)
    return given if given is not None else load_inputs(config_path)


def hand_over(config_path, inputs, *, forget=False):
    """Give the next flow run of ``config_path`` in this process the inputs already read.

    The ``ingest`` task then takes them instead of reading every file again.

    Parameters
    ----------
    config_path : str
        The config path exactly as passed to the flow.
    inputs : quakefolio.pipeline.stages.inputs.RunInputs or None
        What :func:`quakefolio.pipeline.stages.inputs.load_inputs` returned for it; None
        does nothing.
    forget : bool
        Drop what was handed over for ``config_path`` and not taken (after the flow run).
    """
    if forget:
        _READ.pop(config_path, None)
    elif inputs is not None:
        _READ[config_path] = inputs


#: ``portfolio_risk`` on a thread pool of that many workers (each flow run takes a copy of the runner)
_LOCAL_FLOWS = {}


def run_flow(config_path, max_workers=2, stages_to_run="all", inputs=None):
    """Run the flow with a capped thread pool (embedded, or on the API Prefect's settings name).

    Parameters
    ----------
    config_path : str or Path
    max_workers : int
        Threads of the task runner.
    stages_to_run : {"all", "hazard"}
    inputs : quakefolio.pipeline.stages.inputs.RunInputs, optional
        The inputs of ``config_path`` already read in this process (read once per run).

    Returns
    -------
    str
        The run folder.
    """
    key = int(max_workers)
    if key not in _LOCAL_FLOWS:  # the flow with its runner, made once per process (it builds a parameter schema)
        _LOCAL_FLOWS[key] = portfolio_risk.with_options(task_runner=ThreadPoolTaskRunner(max_workers=key))
    hand_over(str(config_path), inputs)
    try:
        with temporary_settings(updates={PREFECT_FLOWS_HEARTBEAT_FREQUENCY: None}):  # see the module's notes
            return _LOCAL_FLOWS[key](str(config_path), stages_to_run)
    finally:
        hand_over(str(config_path), None, forget=True)
