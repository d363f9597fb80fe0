"""Benchmark: fragility convolution for a large portfolio, per unique (site, class) pair.

Run: ``python benchmarks/bench_risk.py``.

A synthetic portfolio (invented numbers) of up to 10**6 assets on 2,000 hazard sites with
7 building classes of 4 damage states each, hazard curves of 40 levels.  Timed side by
side in one process, interleaved, median of the per-round ratios (``timing.py``):

* kernel: exact damage-state rates of every unique pair
  (:func:`quakefolio.core.risk.damage_state_rates`, one call per class on the class's curves,
  gathered once beforehand), on one thread and on ``workers`` threads (``workers=`` of the
  kernel; one per core);
* reference: the same integral in tight plain numpy (``reference_risk.py``);
* floor: bare ``ndtr`` on exactly the normal-CDF arguments the kernel evaluates, at most 2m
  per (pair, damage state) for m levels (two per segment, one per extrapolated tail, less
  the segment pieces left out as negligible; module notes of
  :mod:`quakefolio.core.risk_pieces`), in one call: the kernel cannot do less on one thread;
* production path: unique (site, class) pairs, the curves gathered per class, the kernel,
  EAL per pair, broadcast to assets;
* baseline: bare ``scipy.special.ndtr`` (into a preallocated array) on as many
  standard-normal values as pairs x damage states x levels.

Single-thread rows are CPU-time ratios.  The threaded kernel is timed on the wall clock
against the baseline on the wall clock in rounds of their own (``timing.WALL``): its CPU
time is summed over its threads, and its wall time depends on the cores that other jobs
leave free, so the load average is printed beside it.

Rows: kernel on one thread / baseline (target <= 2; its floor is the normal-CDF evaluations
it makes, about 1.6 per value here, printed as counted and as measured), kernel on ``workers`` threads / baseline
(wall clock; target <= 2), reference / baseline, kernel / reference, production path /
baseline; the agreement of kernel and reference; the fitted exponent of kernel time vs
number of pairs (linear growth: about 1).
"""
from __future__ import annotations

import os

import numpy as np
from scipy.special import ndtr

from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.risk import damage_state_rates
from quakefolio.core.risk_pieces import PHI_PER_LEVEL, _kept_pieces

from reference_risk import damage_state_rates_reference
from timing import WALL, interleaved, load_average, ratio, row

N_LEVELS, N_DS, N_CLASSES = 40, 4, 7
SEED = 2026
TARGET = 2.0
#: threads of the threaded kernel: one per core
WORKERS = max(2, os.cpu_count() or 1)


def synthetic(n_sites, n_assets, rng):
    levels = np.geomspace(5e-4, 4.0, N_LEVELS)
    scale = rng.uniform(0.3, 3.0, n_sites)[:, None]
    lnx = np.log(levels / scale)
    rates = np.exp(-4.6 - 1.6 * lnx - 0.12 * lnx ** 2)
    rates = np.minimum.accumulate(np.minimum(rates, 0.5), axis=1)
    medians = np.sort(rng.uniform(0.1, 2.5, (N_CLASSES, N_DS)), axis=1) * np.arange(1, N_DS + 1) ** 0.3
    betas = np.full((N_CLASSES, N_DS), 0.6)
    mdr = np.array([0.02, 0.12, 0.5, 1.0])
    asset_site = rng.integers(0, n_sites, n_assets)
    asset_class = rng.integers(0, N_CLASSES, n_assets)
    return levels, rates, medians, betas, mdr, asset_site, asset_class


def unique_pairs(a_site, a_class, n_sites):
    """Unique (site, class) pairs of the assets: class, site, and each asset's pair."""
    key = a_class.astype(np.int64) * n_sites + a_site
    uniq, inverse = np.unique(key, return_inverse=True)
    return uniq // n_sites, uniq % n_sites, inverse


def class_rows(rates, p_class, p_site):
    """Per class (the small axis): the indices of its pairs and their hazard curves, gathered once."""
    return [(idx, rates[p_site[idx]]) for idx in (np.flatnonzero(p_class == c) for c in range(N_CLASSES))]


def per_class(fn, levels, rows, medians, betas, **kw):
    """Damage-state rates of every pair, one call per class on its gathered curves (``class_rows``)."""
    ds = np.empty((sum(len(idx) for idx, _ in rows), N_DS))
    for c, (idx, curves) in enumerate(rows):
        ds[idx] = fn(levels, curves, medians[c], betas[c], **kw)
    return ds


def phi_arguments(levels, rates, medians, betas, p_class, p_site):
    """The normal-CDF arguments the kernel evaluates: at most 2m per (pair, state).

    Per piece (lower tail, segments, upper tail) the bounds ``lo, hi`` in z plus ``k beta``
    (module notes of :mod:`quakefolio.core.risk_pieces`), survival side where ``lo > 0``;
    the infinite bound of each tail needs no evaluation, nor do the pieces the kernel leaves
    out as negligible for the class's rows.
    """
    lnx = np.log(levels)
    out = []
    for c in range(N_CLASSES):
        ln_lam = np.log(rates[p_site[p_class == c]])
        k = (ln_lam[:, :-1] - ln_lam[:, 1:]) / np.diff(lnx)
        kb = np.concatenate([k[:, :1], k, k[:, -1:]], axis=1)[:, None, :] * betas[c][:, None]
        z = (lnx - np.log(medians[c])[:, None]) / betas[c][:, None]  # (n_ds, m)
        lo = np.concatenate([np.full(kb.shape[:-1] + (1,), -np.inf), z + kb[..., 1:]], axis=-1)
        hi = np.concatenate([z + kb[..., :-1], np.full(kb.shape[:-1] + (1,), np.inf)], axis=-1)
        keep = _kept_pieces(lnx, rates[p_site[p_class == c]], np.log(medians[c]), betas[c])  # (n_ds, m + 1)
        out += [-np.abs(lo[..., 1:])[:, keep[:, 1:]].ravel(),
                np.where(lo >= 0, -hi, hi)[..., :-1][:, keep[:, :-1]].ravel()]
    return np.concatenate(out)


def production(levels, rates, medians, betas, mdr, a_site, a_class, n_sites):
    p_class, p_site, inverse = unique_pairs(a_site, a_class, n_sites)
    ds = per_class(damage_state_rates, levels, class_rows(rates, p_class, p_site), medians, betas)
    return expected_annual_loss(ds, mdr)[inverse]  # broadcast to assets


def measure(n_sites, n_assets, rng):
    levels, rates, medians, betas, mdr, a_site, a_class = synthetic(n_sites, n_assets, rng)
    p_class, p_site, _ = unique_pairs(a_site, a_class, n_sites)
    z = np.random.default_rng(1).standard_normal((len(p_class), N_DS, N_LEVELS))
    out = np.empty_like(z)
    args = (levels, class_rows(rates, p_class, p_site), medians, betas)
    phi_args = phi_arguments(levels, rates, medians, betas, p_class, p_site)
    assert phi_args.size <= PHI_PER_LEVEL * z.size
    out_floor = np.empty_like(phi_args)
    kernel = per_class(damage_state_rates, *args)
    assert np.array_equal(kernel, per_class(damage_state_rates, *args, workers=WORKERS))
    reference = per_class(damage_state_rates_reference, *args)
    agreement = float(np.max(np.abs(kernel - reference) / reference))
    times = interleaved({
        "ndtr": lambda: ndtr(z, out=out),
        "kernel": lambda: per_class(damage_state_rates, *args),
        "floor": lambda: ndtr(phi_args, out=out_floor),
        "reference": lambda: per_class(damage_state_rates_reference, *args),
        "production": lambda: production(levels, rates, medians, betas, mdr, a_site, a_class, n_sites),
    })
    walls = interleaved({
        "ndtr": lambda: ndtr(z, out=out),
        "kernel": lambda: per_class(damage_state_rates, *args),
        "threads": lambda: per_class(damage_state_rates, *args, workers=WORKERS),
    }, clock=WALL)
    return len(p_class), times, walls, agreement, phi_args.size / z.size


def main():
    rng = np.random.default_rng(SEED)
    print("fragility convolution benchmark (synthetic, invented inputs)")
    print(f"load average at start: {load_average():.2f} on {os.cpu_count()} cores; threaded kernel: "
          f"{WORKERS} threads")
    print(f"{'assets':>9} {'pairs':>7} {'evaluations':>12} {'ndtr s':>8} {'kernel':>7} {'floor':>6} {'ref':>6} "
          f"{'k/ref':>6} {'prod':>6} | {'wall: 1 thr':>11} {f'{WORKERS} thr':>6} {'load':>5}")
    sizes = [(500, 250_000), (1000, 500_000), (2000, 1_000_000)]
    pairs, kernel_s = [], []
    for n_sites, n_assets in sizes:
        n_pairs, times, walls, agreement, per_value = measure(n_sites, n_assets, rng)
        k, f, r = ratio(times, "kernel", "ndtr"), ratio(times, "floor", "ndtr"), ratio(times, "reference", "ndtr")
        kr, p = ratio(times, "kernel", "reference"), ratio(times, "production", "ndtr")
        w1, wt = ratio(walls, "kernel", "ndtr"), ratio(walls, "threads", "ndtr")
        print(f"{n_assets:>9} {n_pairs:>7} {n_pairs * N_DS * N_LEVELS:>12} {np.median(times['ndtr']):>8.4f} "
              f"{k[0]:>7.2f} {f[0]:>6.2f} {r[0]:>6.2f} {kr[0]:>6.2f} {p[0]:>6.2f} | {w1[0]:>11.2f} {wt[0]:>6.2f} "
              f"{load_average():>5.2f}")
        pairs.append(n_pairs)
        kernel_s.append(np.median(times["kernel"]))
    print("(CPU-time ratios to the left of |, wall-clock ratios to the right, each a median of interleaved rounds)")
    print(f"kernel vs reference, largest size: max relative difference {agreement:.1e}; "
          f"threaded kernel: identical tables")
    slope = np.polyfit(np.log(pairs), np.log(kernel_s), 1)[0]
    print(f"fitted exponent of kernel time vs pairs: {slope:.2f} (linear = 1)")
    print(f"floor: the exact integral needs {PHI_PER_LEVEL} normal-CDF evaluations per value "
          f"({PHI_PER_LEVEL * N_LEVELS} per pair and state for {N_LEVELS} levels); the kernel makes "
          f"{per_value:.2f} per value, leaving out the negligible pieces; measured on its own arguments: {f[0]:.2f}x")
    row("damage convolution kernel, 1 thread (CPU time) / bare ndtr, N pairs x 4 states x 40 levels", k, TARGET)
    row(f"damage convolution kernel, {WORKERS} threads (wall clock, load {load_average():.1f}) / bare ndtr "
        "(wall clock)", wt, TARGET)
    row(f"floor: bare ndtr on the {per_value:.2f} normal-CDF arguments per value the kernel evaluates / bare ndtr", f)
    row("tight numpy reference of the same integral / bare ndtr", r)
    row("damage convolution kernel / tight numpy reference", kr)
    row("production path (unique pairs, kernel, EAL, broadcast) / bare ndtr", p)


if __name__ == "__main__":
    main()
