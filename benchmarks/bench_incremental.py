"""Benchmark: incremental rerun after a hazard change at 1% of the sites.

Run: ``python benchmarks/bench_incremental.py``.

A synthetic, invented compute-mode portfolio (10^4 assets on 2,000 sites, an area source,
two ground-motion models, three IMs; event-based stage off) is run three times through
the pure-library path: a full run with an empty cache, an unchanged rerun, and a rerun
after the site conditions (Vs30) of the assets at 1% of the sites changed, which changes
the hazard at exactly those sites.  Prints the times and the ratio incremental / full
(target <= 0.1).
"""
from __future__ import annotations

import shutil
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from quakefolio.pipeline.runner import run_pure

N_ASSETS, N_SITES = 10_000, 2_000


def write_inputs(folder):
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from bench_portfolio import write_inputs as base

    cfg = base(folder, years=1000)
    text = cfg.read_text().replace("[portfolio]\nyears = 1000\nseed = 1\n", "[portfolio]\nevent_based = false\n")
    text = text.replace("im_levels_g = [0.01, 0.1, 1.0]\ndisaggregation = false\n",
                        "disaggregation = true\n")
    cfg.write_text(text)
    return cfg


def timed(cfg):
    t = time.perf_counter()
    run = run_pure(cfg)
    return time.perf_counter() - t, run


def main():
    folder = Path(tempfile.mkdtemp(prefix="quakefolio-bench-"))
    cfg = write_inputs(folder)
    full, _ = timed(cfg)
    same, _ = timed(cfg)
    ex = pd.read_csv(folder / "exposure.csv")
    sites = ex.groupby(["lon", "lat"]).ngroup()
    changed = np.unique(sites)[: N_SITES // 100]
    ex.loc[sites.isin(changed), "vs30_mps"] = 300
    ex.to_csv(folder / "exposure.csv", index=False)
    incr, run = timed(cfg)
    import json

    cache = json.loads((run / "manifest.json").read_text())["cache"]
    print(f"incremental rerun benchmark: {N_ASSETS} assets on {N_SITES} hazard sites (invented inputs)")
    print(f"full run (empty cache)              {full:7.2f} s")
    print(f"rerun, nothing changed              {same:7.2f} s   ratio {same / full:.3f}")
    print(f"rerun, hazard changed at 1% sites   {incr:7.2f} s   ratio {incr / full:.3f} (target <= 0.1)")
    print("recomputed in the incremental run:", ", ".join(f"{k} {v['computed']}/{v['computed'] + v['from_cache']}"
                                                     for k, v in cache.items()))
    shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
