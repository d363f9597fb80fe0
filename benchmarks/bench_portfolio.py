"""Benchmark: event-based portfolio losses, 10^4 assets on 2,000 unique sites.

Run: ``python benchmarks/bench_portfolio.py`` (each size runs in its own subprocess so that
peak memory is measured per size).

A synthetic, invented portfolio and source model (written to a temporary folder): 10^4
assets of 3 classes on 2,000 unique sites, an area source around them, two ground-motion
models, PGA/SA_0.3/SA_1.0. Timed: the event stage (event set, correlated fields with the
dense Jayaram & Baker 2009 factor on 2,000 sites, losses per asset and event, year losses
and EP curves) for 10^4 and 10^5 simulated years. Printed per size: events, asset-events
per second, peak resident memory, and the ratio of the time to bare numpy normal sampling
of as many values as the fields hold (events x sites x IMs).
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

N_ASSETS, N_SITES = 10_000, 2_000


def write_inputs(folder, years):
    rng = np.random.default_rng(3)
    lon = 10.0 + rng.uniform(-0.25, 0.25, N_SITES)
    lat = 20.0 + rng.uniform(-0.25, 0.25, N_SITES)
    site = rng.integers(0, N_SITES, N_ASSETS)
    site[:N_SITES] = np.arange(N_SITES)  # every site used
    classes = np.array(["BA", "BB", "BC"])[rng.integers(0, 3, N_ASSETS)]
    rows = ["asset_id,lon,lat,building_class,replacement_value,vs30_mps"]
    for i in range(N_ASSETS):
        rows.append(f"X{i:05d},{lon[site[i]]:.6f},{lat[site[i]]:.6f},{classes[i]},{rng.uniform(1e5, 5e6):.0f},400")
    (folder / "exposure.csv").write_text("\n".join(rows) + "\n")
    lib = ['format = "quakefolio-fragility-1"']
    for code, im, med in (("BA", "SA_0.3", 0.3), ("BB", "SA_1.0", 0.15), ("BC", "PGA", 0.25)):
        lib.append(f'[classes.{code}]\nim = "{im}"')
        for name, f, mdr in (("d1", 1.0, 0.05), ("d2", 2.5, 0.3), ("d3", 5.0, 1.0)):
            lib.append(f'[[classes.{code}.states]]\nname = "{name}"\nmedian = {med * f}\nbeta = 0.6\n'
                       f'mean_damage_ratio = {mdr}')
    (folder / "lib.toml").write_text("\n".join(lib) + "\n")
    (folder / "src.toml").write_text(
        'format = "quakefolio-sources-1"\n[[areas]]\nid = "zone"\n'
        'polygon = [[9.0, 19.0], [11.0, 19.0], [11.0, 21.0], [9.0, 21.0]]\nspacing_km = 12.0\n'
        'upper_depth_km = 0.0\nlower_depth_km = 20.0\nhypo_depths = [[10.0, 1.0]]\n'
        'mechanisms = [[0.0, 90.0, 0.0, 1.0]]\n'
        'mfd = { kind = "truncated_gr", b_value = 1.0, min_mag = 5.0, max_mag = 7.0, bin_width = 0.1, '
        'rate_above_min = 0.5 }\n')
    (folder / "q.toml").write_text(
        '[scenario]\nname = "benchmark (invented)"\n[hazard]\nmode = "compute"\n'
        'source_models = [{ file = "src.toml", weight = 1.0 }]\n'
        'gmm_branches = [{ model = "BSSA14", weight = 0.5 }, { model = "CB14", weight = 0.5 }]\n'
        'im_levels_g = [0.01, 0.1, 1.0]\ndisaggregation = false\n'
        f'[portfolio]\nyears = {years}\nseed = 1\n[exposure]\nfile = "exposure.csv"\n[fragility]\nlibrary = "lib.toml"\n'
        '[execution]\nevent_block_size = 1024\n')
    return folder / "q.toml"


def measure(years):
    from quakefolio.core.events.eventset import event_blocks
    from quakefolio.pipeline.stages import events as ps
    from quakefolio.pipeline import stages

    folder = Path(tempfile.mkdtemp(prefix="quakefolio-bench-"))
    inputs = stages.load_inputs(write_inputs(folder, years))
    t0 = time.perf_counter()
    em = ps.prepare_events(inputs)
    chunks = ps.event_chunks(em)
    totals = [ps.event_chunk(em, c) for c in chunks]
    gu = np.concatenate([r.ground_up for r in totals])
    from quakefolio.core.events.portfolio import ep_from_years, year_loss

    agg, occ = year_loss(em.events.year, gu, years)
    ep_from_years(agg, [100, 250, 475, 2475])
    elapsed = time.perf_counter() - t0
    n_ev = em.events.n_events
    n_values = n_ev * len(em.sites) * len(em.ims)
    t1 = time.perf_counter()
    rng = np.random.default_rng(0)
    for lo in range(0, n_values, 10_000_000):
        rng.standard_normal(min(10_000_000, n_values - lo))
    bare = time.perf_counter() - t1
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"years": years, "events": int(n_ev), "asset_events": int(n_ev * N_ASSETS), "seconds": elapsed,
            "asset_events_per_s": n_ev * N_ASSETS / elapsed, "peak_rss_mb": peak_mb,
            "normal_values": int(n_values), "bare_normal_s": bare, "ratio": elapsed / bare}


def main():
    if len(sys.argv) == 2:
        print(json.dumps(measure(int(sys.argv[1]))))
        return
    print(f"event-based portfolio benchmark: {N_ASSETS} assets on {N_SITES} unique sites (invented inputs)")
    print(f"{'years':>7} {'events':>7} {'asset-events':>13} {'time s':>8} {'asset-events/s':>15} {'peak MB':>8} "
          f"{'ratio to normal sampling':>25}")
    for years in (10_000, 100_000):
        out = subprocess.run([sys.executable, __file__, str(years)], capture_output=True, text=True,
                             env=dict(os.environ), check=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"{r['years']:>7} {r['events']:>7} {r['asset_events']:>13} {r['seconds']:>8.1f} "
              f"{r['asset_events_per_s']:>15.3g} {r['peak_rss_mb']:>8.0f} {r['ratio']:>25.1f}")
    print("ratio = event-stage time / time of numpy standard_normal for events x sites x IMs values")


if __name__ == "__main__":
    main()
