"""The Prefect flow ``portfolio-risk``: thin tasks around the stage functions.

Import this module only after :func:`quakefolio.pipeline.env.configure_prefect` has
set Prefect's environment (the CLI does it first thing).  Tasks pass in-memory
objects between threads of one process and therefore use no cache policy and do not
persist results (Prefect would pickle large arrays); parameters stay small JSON.
"""
from __future__ import annotations

import time

from prefect import flow, task
from prefect.cache_policies import NO_CACHE
from prefect.task_runners import ThreadPoolTaskRunner

from quakefolio.pipeline import stages
from quakefolio.pipeline.runner import write_run

__all__ = ["portfolio_risk", "run_flow"]

_TASK = dict(cache_policy=NO_CACHE, persist_result=False)


@task(name="ingest", **_TASK)
def ingest_task(config_path: str):
    return stages.load_inputs(config_path)


@task(name="damage-and-loss-block", **_TASK)
def block_task(inputs, block):
    return stages.compute_block(inputs, block)


@task(name="store-run", **_TASK)
def store_task(inputs, results, timings):
    return str(write_run(inputs, results, timings))


@flow(name="portfolio-risk", persist_result=False, log_prints=False)
def portfolio_risk(config_path: str) -> str:
    """Ingest -> damage and loss per block of (site, class) pairs -> store."""
    t0 = time.perf_counter()
    inputs = ingest_task(config_path)
    t1 = time.perf_counter()
    blocks = stages.plan_blocks(inputs)
    futures = [block_task.submit(inputs, b) for b in blocks]
    results = [f.result() for f in futures]  # resolve every future: a failure fails the flow
    t2 = time.perf_counter()
    return store_task(inputs, results, {"ingest_s": t1 - t0, "damage_loss_s": t2 - t1})


def run_flow(config_path, max_workers=2):
    """Run the flow embedded with a capped thread pool; returns the run folder."""
    runner = ThreadPoolTaskRunner(max_workers=max_workers)
    return portfolio_risk.with_options(task_runner=runner)(str(config_path))
