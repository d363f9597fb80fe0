"""Benchmark: the event-based stage against a tight reference of the same computation.

Run: ``python benchmarks/bench_portfolio.py [--repeat N] [--target-only] [--workers N]`` (``make
bench`` runs it with the others; ``--target-only`` measures the target row alone; ``--workers``
sets ``[execution] max_workers`` of the generated config, default 2, the config's default).

A synthetic, invented portfolio and source model (written to a temporary folder): buildings
of 3 classes on 2,000 unique sites, an area source around them, two ground-motion models
(the whole logic tree: each simulated year draws one), PGA/SA_0.3/SA_1.0, the
mean-damage-ratio loss model, no policy terms.  Timed, in a fresh process per run: the event
stage (:func:`quakefolio.pipeline.stages.events.prepare_events`, every chunk of
:func:`~quakefolio.pipeline.stages.events.event_chunk`, year losses and AEP points) and, in
another process, the reference (``reference_events.py``: plain numpy, the same numbers).
Threads: the stage splits each chunk's groups of ruptures and random-number blocks over
``[execution] max_workers`` threads (:mod:`quakefolio.core.events.threads`; the values do not
depend on it), the reference runs on one thread; both keep BLAS on one thread.  The CPU-time
ratio compares the work of the two (threads add their CPU times), the wall-time ratio
includes the stage's threads; every printed row names the thread counts.
Stage and reference runs alternate (stage, reference, stage, ...), so machine load hits
both alike; printed are the medians of the times, the median of the paired ratios, and
the largest peak resident memory of the stage's processes (``ru_maxrss`` of the child,
what ``/usr/bin/time -v`` reports as "Maximum resident set size"; inputs and imports
included), each beside its target (issue 12; targets of the row with 10^5 buildings).
The last row (three times the years) shows that memory stays flat as years grow.

For the target row, ``row:`` lines (``timing.row``) give the ratio against the reference,
on CPU time (as the other benchmarks: steadier on a shared machine) and on wall time, each with
the target beside it and the thread counts in its name, and one line gives the stage's
absolute seconds and peak memory with its thread count and the load average of the machine
while it ran (wall time on 2 threads is only meaningful with both cores free).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from timing import row  # noqa: E402
N_SITES = 2_000
#: (buildings, simulated years, repeated?): the middle row is the target row; the last one (run
#: once per side) shows memory flat as years grow
SIZES = ((10_000, 10_000, True), (100_000, 10_000, True), (10_000, 30_000, False))
TARGET = {"seconds": 12.0, "peak_mb": 1024.0, "ratio": 1.5}  # 10^5 buildings, 10^4 years


def write_inputs(folder, years, n_assets=10_000, n_sites=N_SITES, terms=False, event_block_size=1024, workers=None):
    """Invented inputs: exposure (optionally with per-building terms on two buildings in three),
    fragility library, area source model and run config (``workers``: ``[execution] max_workers``,
    None for the default); returns the config path."""
    rng = np.random.default_rng(3)
    lon = 10.0 + rng.uniform(-0.25, 0.25, n_sites)
    lat = 20.0 + rng.uniform(-0.25, 0.25, n_sites)
    site = rng.integers(0, n_sites, n_assets)
    site[:min(n_sites, n_assets)] = np.arange(min(n_sites, n_assets))  # every site used
    classes = np.array(["BA", "BB", "BC"])[rng.integers(0, 3, n_assets)]
    value = rng.uniform(1e5, 5e6, n_assets)
    rows = ["asset_id,lon,lat,building_class,replacement_value,vs30_mps" + (",deductible,limit" if terms else "")]
    for i in range(n_assets):
        extra = ""
        if terms:
            extra = (f",{0.02 * value[i]:.0f},{0.5 * value[i]:.0f}", f",{0.01 * value[i]:.0f},", ",,")[i % 3]
        rows.append(f"X{i:06d},{lon[site[i]]:.6f},{lat[site[i]]:.6f},{classes[i]},{value[i]:.0f},400{extra}")
    (folder / "exposure.csv").write_text("\n".join(rows) + "\n")
    lib = ['format = "quakefolio-fragility-1"']
    for code, im, med in (("BA", "SA_0.3", 0.3), ("BB", "SA_1.0", 0.15), ("BC", "PGA", 0.25)):
        lib.append(f'[classes.{code}]\nim = "{im}"')
        for name, f, mdr, cov in (("d1", 1.0, 0.05, 0.5), ("d2", 2.5, 0.3, 0.3), ("d3", 5.0, 1.0, 0.0)):
            lib.append(f'[[classes.{code}.states]]\nname = "{name}"\nmedian = {med * f}\nbeta = 0.6\n'
                       f'mean_damage_ratio = {mdr}\ncov = {cov}')
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
        f'[execution]\nevent_block_size = {event_block_size}\n' + (f'max_workers = {workers}\n' if workers else ''))
    return folder / "q.toml"


def run_stage(inputs):
    """The event stage as the runner drives it (one process): ground-up losses of every event."""
    from quakefolio.core.events.portfolio import ep_from_years, year_loss
    from quakefolio.pipeline.stages import events as ps

    em = ps.prepare_events(inputs)
    results = [ps.event_chunk(em, c) for c in ps.event_chunks(em)]
    gu = np.concatenate([r.ground_up for r in results])
    agg, _ = year_loss(em.events.year, gu, em.n_years)
    ep_from_years(agg, [100, 250, 475, 2475])
    return gu


def run_reference(inputs):
    sys.path.insert(0, str(HERE))
    from reference_events import reference_event_losses

    return reference_event_losses(inputs)["ground_up"]


def child(side, config):
    """One measured run in this process: prints a JSON line."""
    from quakefolio.pipeline import stages

    inputs = stages.load_inputs(config)
    t0, c0 = time.perf_counter(), time.process_time()
    gu = (run_stage if side == "stage" else run_reference)(inputs)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # KiB on Linux
    threads = inputs.config.execution.max_workers if side == "stage" else 1
    print(json.dumps({"seconds": seconds, "cpu": cpu, "peak_mb": peak_mb, "events": int(gu.size),
                      "total": float(gu.sum()), "threads": threads}))


def _measure(side, config):
    out = subprocess.run([sys.executable, __file__, "--child", side, str(config)], capture_output=True, text=True,
                         env=dict(os.environ), check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def _target_rows(st, ref, load):
    """The target row's ratios (``row:`` lines) and its absolute seconds and peak memory."""
    threads = f"stage on {st[0]['threads']} thread{'s' if st[0]['threads'] > 1 else ''}, reference on 1"
    label = f"event-based stage / tight reference, 10^5 buildings on {N_SITES:,} sites, 10^4 years"
    for key, what in (("cpu", f"CPU time; {threads}"), ("seconds", f"wall time; {threads}")):
        r = [s[key] / f[key] for s, f in zip(st, ref)]
        row(f"{label} ({what})", (statistics.median(r), min(r), max(r)), TARGET["ratio"], rounds=len(r))
    seconds, cpu = statistics.median(s["seconds"] for s in st), statistics.median(s["cpu"] for s in st)
    peak_gb = max(s["peak_mb"] for s in st) / 1024
    avg = " to ".join("/".join(f"{x:.1f}" for x in la) for la in (load[0], load[-1]))
    print(f"absolute: stage on {st[0]['threads']} thread(s) {seconds:.1f} s wall, {cpu:.1f} s CPU "
          f"(target <= {TARGET['seconds']:g} s "
          f"{'ok' if seconds <= TARGET['seconds'] else 'MISSED'}), peak {peak_gb:.2f} GB (target <= "
          f"{TARGET['peak_mb'] / 1024:g} GB {'ok' if peak_gb * 1024 <= TARGET['peak_mb'] else 'MISSED'}); "
          f"load average (1/5/15 min) {avg} on {os.cpu_count()} cores", flush=True)
    secs, peaks = [s["seconds"] for s in st], [s["peak_mb"] / 1024 for s in st]
    for what, values, target, unit in (("wall time", secs, TARGET["seconds"], "s"),
                                       ("peak memory", peaks, TARGET["peak_mb"] / 1024, "GB")):
        med = statistics.median(values)
        print(f"row: event-based stage, {label.split(', ', 1)[-1]}, {what} (median of {len(values)} runs): "
              f"{med:.2f} {unit} (target <= {target:g} {unit}) {'ok' if med <= target else 'MISSED'} "
              f"[{min(values):.2f}-{max(values):.2f}]", flush=True)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3, help="runs of each side per size (default 3)")
    parser.add_argument("--target-only", action="store_true", help="measure the target row alone")
    parser.add_argument("--workers", type=int, default=None,
                        help="[execution] max_workers of the stage (default: the config's default, 2)")
    parser.add_argument("--child", nargs=2, metavar=("SIDE", "CONFIG"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return
    print(f"event-based stage vs a tight reference (reference_events.py), {N_SITES} sites, invented inputs; "
          f"stage and reference runs alternate, {args.repeat} each; medians")
    print(f"{'buildings':>9} {'years':>6} {'events':>6} {'stage s':>8} {'ref s':>6} {'ratio':>6} {'cpu s':>6} "
          f"{'cpu ratio':>9} {'peak MB':>8} {'ref MB':>7} {'asset-events/s':>15} {'stage thr':>9}  targets")
    load = [os.getloadavg()]
    for n_assets, years, repeated in SIZES:
        if args.target_only and (n_assets, years, repeated) != SIZES[1]:
            continue
        folder = Path(tempfile.mkdtemp(prefix="quakefolio-bench-"))
        config = write_inputs(folder, years, n_assets, workers=args.workers)
        runs = {"stage": [], "reference": []}
        for _ in range(max(1, args.repeat) if repeated else 1):
            for side in runs:
                runs[side].append(_measure(side, config))
        st, ref = runs["stage"], runs["reference"]
        assert all(abs(s["total"] - r["total"]) <= 1e-9 * abs(r["total"]) for s, r in zip(st, ref)), "disagree"
        med = lambda key, rows: statistics.median(r[key] for r in rows)  # noqa: E731
        ratio = statistics.median(s["seconds"] / r["seconds"] for s, r in zip(st, ref))
        cpu_ratio = statistics.median(s["cpu"] / r["cpu"] for s, r in zip(st, ref))
        peak = max(r["peak_mb"] for r in st)
        target = ""
        if (n_assets, years, repeated) == SIZES[1]:
            target = (f"<= {TARGET['seconds']:.0f} s {'ok' if med('seconds', st) <= TARGET['seconds'] else 'MISSED'}, "
                      f"<= {TARGET['ratio']}x {'ok' if ratio <= TARGET['ratio'] else 'MISSED'}, "
                      f"<= 1 GB {'ok' if peak <= TARGET['peak_mb'] else 'MISSED'}")
        print(f"{n_assets:>9} {years:>6} {st[0]['events']:>6} {med('seconds', st):>8.2f} {med('seconds', ref):>6.2f} "
              f"{ratio:>6.2f} {med('cpu', st):>6.2f} {cpu_ratio:>9.2f} {peak:>8.0f} "
              f"{max(r['peak_mb'] for r in ref):>7.0f} {st[0]['events'] * n_assets / med('seconds', st):>15.3g} "
              f"{st[0]['threads']:>9}  {target}", flush=True)
        if (n_assets, years, repeated) == SIZES[1]:
            load.append(os.getloadavg())
            _target_rows(st, ref, load)
    print("ratio = median over alternating pairs of stage / reference wall time (cpu ratio: of their CPU times, "
          "steadier on a shared machine; the threads' CPU times add up); stage on [execution] max_workers threads "
          "(stage thr), reference on 1; peak MB = max resident set of the stage's processes (inputs and imports "
          "included); the last row: memory flat as years grow")


if __name__ == "__main__":
    main()
