"""The Prefect flow ``portfolio-risk``: the stages of :func:`quakefolio.pipeline.runner.execute`
as Prefect tasks.

Import this module only after :func:`quakefolio.pipeline.env.configure_prefect` has
set Prefect's environment (the CLI does it first thing).  Tasks pass in-memory
objects between threads of one process and therefore use no cache policy and do not
persist results (Prefect would pickle large arrays); flow parameters stay small JSON.
The stage sequence is shared with the pure-library path, so both give identical tables.
"""
from __future__ import annotations

from contextlib import contextmanager

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.context import FlowRunContext
from prefect.task_runners import ThreadPoolTaskRunner

from quakefolio.pipeline import progress, stages
from quakefolio.pipeline.runner import execute, stage_guard

__all__ = ["portfolio_risk", "run_flow", "PrefectExecutor"]

_TASK = dict(cache_policy=NO_CACHE, persist_result=False)


#: stages that read or write files and may meet a transient I/O error: retried on OSError only
_IO_STAGES = {"ingest": 2, "store-run": 2}


def _retry_on_os_error(task, task_run, state):
    """Retry condition: only transient I/O errors (never a user-input error)."""
    from quakefolio.core.errors import InputError

    try:
        state.result()
    except InputError:
        return False
    except OSError:
        return True
    except Exception:  # noqa: BLE001 - anything else is not transient
        return False
    return False


class PrefectExecutor:
    """Runs each stage function as a Prefect task; ``many`` maps over blocks."""

    config_path = None

    def __init__(self):
        self._tasks = {}

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
        return stage_guard(name, self.config_path, lambda: self._task(name, fn)(*args))

    def many(self, name, fn, arglist):
        t = self._task(name, fn)
        progress.stage(name, len(arglist))
        futures = [t.submit(*args) for args in arglist]
        out = []
        for f in futures:  # resolve every future: a failure fails the flow
            out.append(stage_guard(name, self.config_path, f.result))
            progress.advance(name)
        return out


@flow(name="portfolio-risk", persist_result=False, log_prints=False)
def portfolio_risk(config_path: str, stages_to_run: str = "all") -> str:
    """Ingest -> hazard (compute mode) -> damage and loss per block -> store."""
    executor = PrefectExecutor()
    executor.config_path = config_path
    inputs = executor.one("ingest", stages.load_inputs, config_path)
    with _for_task_runner(executor, inputs, config_path) as executor:
        return str(execute(inputs, executor, stages_to_run=stages_to_run))


@contextmanager
def _for_task_runner(executor, inputs, config_path):
    """The executor for this flow run's task runner.

    On a Dask task runner, block stages go to the workers with small arguments
    (:class:`quakefolio.pipeline.orchestration.DaskExecutor`); otherwise ``executor``.
    """
    runner = FlowRunContext.get().task_runner
    if not type(runner).__module__.startswith("prefect_dask"):
        yield executor
        return
    from quakefolio.pipeline.orchestration import DaskExecutor

    with DaskExecutor(inputs, config_path) as dask_executor:
        dask_executor.config_path = executor.config_path
        yield dask_executor


def run_flow(config_path, max_workers=2, stages_to_run="all"):
    """Run the flow embedded with a capped thread pool; returns the run folder."""
    runner = ThreadPoolTaskRunner(max_workers=max_workers)
    return portfolio_risk.with_options(task_runner=runner)(str(config_path), stages_to_run)
