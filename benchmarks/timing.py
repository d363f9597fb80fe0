"""Shared timing for the ratio benchmarks: interleaved runs in one process, medians of ratios.

The machine the benchmarks run on is shared and noisy, so absolute times mean little; what
counts is the ratio of a computation to its baseline measured side by side.  Every repeat
runs each candidate once, in the same order, right after one another; the ratio of each
repeat is taken, and the median over repeats is reported (with the spread).  Times are the
process's CPU time (``time.process_time``) by default: time spent waiting for a core while
other jobs run is not counted, which suits candidates that run on one thread.  A candidate
that runs on several threads is timed on the wall clock (``clock=WALL``) against a
baseline timed on the same clock in the same rounds: its CPU time is the sum over its
threads, and its wall time depends on how many cores the other jobs leave free, so such
ratios are reported with the load average.

A result row is printed as ``row: <name>: <ratio>x (target <= <t>x) ok|MISSED``;
``run_all.py`` collects these lines into the summary at the end of ``make bench``.
"""
from __future__ import annotations

import os
import time

import numpy as np

#: repeats per measurement (``BENCH_REPEATS`` overrides; at least 3)
REPEATS = max(3, int(os.environ.get("BENCH_REPEATS", "5")))

#: the clocks of :func:`interleaved`: CPU time of the process [s], wall time [s]
CPU, WALL = time.process_time, time.perf_counter


def load_average():
    """One-minute load average of the machine (NaN where the system does not report it)."""
    try:
        return os.getloadavg()[0]
    except (AttributeError, OSError):
        return float("nan")


def interleaved(candidates, repeats=REPEATS, clock=CPU):
    """CPU times [s] of each candidate over ``repeats`` interleaved rounds.

    Parameters
    ----------
    candidates : dict of str to callable
        Called without arguments, in dict order, once per round.
    repeats : int
    clock : callable
        :data:`CPU` (default) or :data:`WALL`, the same for every candidate.

    Returns
    -------
    dict of str to ndarray, shape (repeats,)
    """
    times = {name: np.empty(repeats) for name in candidates}
    for r in range(repeats):
        for name, fn in candidates.items():
            t0 = clock()
            fn()
            times[name][r] = clock() - t0
    return times


def ratio(times, name, base):
    """Median and range over rounds of ``times[name] / times[base]``."""
    r = times[name] / times[base]
    return float(np.median(r)), float(r.min()), float(r.max())


def row(label, stats, target=None, above=False, rounds=None):
    """Print one result row; ``target`` is an upper bound (a lower one if ``above``); ``rounds``
    (default :data:`REPEATS`) is the number of rounds the stats come from."""
    med, lo, hi = stats
    spread = f"[{lo:.2f}-{hi:.2f} over {REPEATS if rounds is None else rounds} rounds]"
    if target is None:
        print(f"row: {label}: {med:.2f}x {spread}", flush=True)
        return
    ok = med >= target if above else med <= target
    sign = ">=" if above else "<="
    print(f"row: {label}: {med:.2f}x (target {sign} {target:g}x) {'ok' if ok else 'MISSED'} {spread}", flush=True)
