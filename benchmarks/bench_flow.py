"""Benchmark: orchestration overhead of the Prefect flow over the pure-library path (demo).

Run: ``python benchmarks/bench_flow.py``.  Both paths run the same stage functions on a
copy of ``demo_portfolio/``; the flow runs embedded (its first run in a process includes
starting the embedded server, reported separately by a second flow run).
"""
from __future__ import annotations

import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
TMP = Path(tempfile.mkdtemp(prefix="quakefolio-bench-"))
os.environ["QUAKEFOLIO_STATE"] = str(TMP / "state")

from quakefolio.pipeline.env import configure_prefect  # noqa: E402

configure_prefect()


def main():
    demo = TMP / "demo"
    shutil.copytree(HERE.parent / "demo_portfolio", demo, ignore=shutil.ignore_patterns("output", "__pycache__"))
    config = demo / "quakefolio.toml"
    from quakefolio.pipeline.runner import run_pure

    t0 = time.perf_counter()
    run_pure(config)
    pure = time.perf_counter() - t0
    from quakefolio.pipeline.flow import run_flow

    t0 = time.perf_counter()
    run_flow(config)
    first = time.perf_counter() - t0
    t0 = time.perf_counter()
    run_flow(config)
    second = time.perf_counter() - t0
    print("demo portfolio: 480 assets, 7 classes, 81 sites")
    print(f"pure-library path        {pure:7.2f} s")
    print(f"flow, first in process   {first:7.2f} s  (includes embedded server start)  ratio {first / pure:6.1f}")
    print(f"flow, second in process  {second:7.2f} s  ratio {second / pure:6.1f}")
    shutil.rmtree(TMP, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
