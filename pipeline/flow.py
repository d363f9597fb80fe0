"""The Prefect flow ``portfolio-risk``: the stages of :func:`quakefolio.pipeline.runner.execute`
as Prefect tasks.

Import this module only after :func:`quakefolio.pipeline.env.configure_prefect` has
set Prefect's environment (the CLI does it first thing).  Tasks pass in-memory
objects between threads of one process and therefore use no cache policy and do not
persist results (Prefect would pickle large arrays); flow parameters stay small JSON.
The stage sequence is shared with the pure-library path, so both give identical tables.
"""
from __future__ import annotations

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import ThreadPoolTaskRunner

from quakefolio.pipeline import stages
from quakefolio.pipeline.runner import execute

__all__ = ["portfolio_risk", "run_flow", "PrefectExecutor"]

_TASK = dict(cache_policy=NO_CACHE, persist_result=False)


class PrefectExecutor:
    """Runs each stage function as a Prefect task; ``many`` maps over blocks."""

    def __init__(self):
        self._tasks = {}

    def _task(self, name, fn):
        key = (name, fn)
        if key not in self._tasks:
            self._tasks[key] = task(fn, name=name, **_TASK)
        return self._tasks[key]

    def one(self, name, fn, *args):
        return self._task(name, fn)(*args)

    def many(self, name, fn, arglist):
        t = self._task(name, fn)
        futures = [t.submit(*args) for args in arglist]
        return [f.result() for f in futures]  # resolve every future: a failure fails the flow


@flow(name="portfolio-risk", persist_result=False, log_prints=False)
def portfolio_risk(config_path: str, stages_to_run: str = "all") -> str:
    """Ingest -> hazard (compute mode) -> damage and loss per block -> store."""
    executor = PrefectExecutor()
    inputs = executor.one("ingest", stages.load_inputs, config_path)
    return str(execute(inputs, executor, stages_to_run=stages_to_run))


def run_flow(config_path, max_workers=2, stages_to_run="all"):
    """Run the flow embedded with a capped thread pool; returns the run folder."""
    runner = ThreadPoolTaskRunner(max_workers=max_workers)
    return portfolio_risk.with_options(task_runner=runner)(str(config_path), stages_to_run)
