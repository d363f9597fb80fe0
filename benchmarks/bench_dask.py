"""Benchmark: the same flow locally (threads) and on a 2-worker Dask cluster, 10^5 assets.

Run: ``python benchmarks/bench_dask.py``.

A synthetic, invented compute-mode portfolio of 10^5 assets on 2,000 sites (the inputs of
``bench_portfolio.py`` scaled up; event-based stage with 2,000 simulated years; cache off)
runs once through the local Prefect flow (thread pool, 2 workers) and once on a
``distributed.LocalCluster`` of 2 worker processes on 127.0.0.1 through prefect-dask, one
local Prefect server serving both.  Prints both times, their ratio and whether the tables
are identical.  On one 2-core machine Dask cannot be faster than threads (numpy already
releases the GIL); the figure shows the overhead of shipping work to processes.
"""
from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
TMP = Path(tempfile.mkdtemp(prefix="quakefolio-bench-dask-"))
os.environ["QUAKEFOLIO_STATE"] = str(TMP / "state")

from quakefolio.pipeline.env import configure_prefect  # noqa: E402

configure_prefect()


def main():
    sys.path.insert(0, str(HERE))
    import bench_portfolio

    bench_portfolio.N_ASSETS = 100_000
    cfg = bench_portfolio.write_inputs(TMP, years=2000)
    cfg.write_text(cfg.read_text().replace("event_block_size = 1024\n", "event_block_size = 1024\ncache = false\n")
                   .replace("im_levels_g = [0.01, 0.1, 1.0]\n", ""))
    import pandas as pd

    from quakefolio.pipeline.flow import run_flow
    from quakefolio.pipeline.orchestration import run_on_dask, using_api
    from quakefolio.pipeline.server import connect_or_start
    from quakefolio.pipeline.io.store import read_table

    server = connect_or_start()
    try:
        with using_api(server.url):
            t = time.perf_counter()
            local = run_flow(cfg, max_workers=2)
            t_local = time.perf_counter() - t
            t = time.perf_counter()
            dask = run_on_dask(cfg, "", api_url=server.url)
            t_dask = time.perf_counter() - t
    finally:
        server.stop()
    local = Path(local)
    same = all(read_table(local, p.stem).equals(read_table(dask, p.stem)) for p in local.glob("*.parquet"))
    print("Dask vs local benchmark: 100000 assets on 2000 sites, compute mode, 2000 simulated years (invented)")
    print(f"local flow (2 threads)          {t_local:7.1f} s")
    print(f"Dask LocalCluster (2 processes) {t_dask:7.1f} s   ratio dask/local {t_dask / t_local:.2f}")
    print(f"tables identical: {same}")


if __name__ == "__main__":
    main()
