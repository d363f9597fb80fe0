"""Benchmark: fragility convolution for a large portfolio, per unique (site, class) pair.

Run: ``python benchmarks/bench_risk.py``.

A synthetic portfolio (invented numbers) of up to 10**6 assets on 2,000 hazard sites with
7 building classes of 4 damage states each, hazard curves of 40 levels.  Timed side by
side in one process, interleaved, median of the per-round ratios (``timing.py``):

* kernel: exact damage-state rates of every unique pair
  (:func:`quakefolio.core.risk.damage_state_rates`, one call per class);
* reference: the same integral in tight plain numpy (``reference_risk.py``);
* production path: unique (site, class) pairs, the kernel, EAL per pair, broadcast to
  assets;
* baseline: bare ``scipy.special.ndtr`` (into a preallocated array) on as many
  standard-normal values as pairs x damage states x levels.

Rows: kernel / baseline (target <= 2), reference / baseline, kernel / reference,
production path / baseline; the agreement of kernel and reference; the fitted exponent of
kernel time vs number of pairs (linear growth: about 1).
"""
from __future__ import annotations

import numpy as np
from scipy.special import ndtr

from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.risk import damage_state_rates

from reference_risk import damage_state_rates_reference
from timing import interleaved, ratio, row

N_LEVELS, N_DS, N_CLASSES = 40, 4, 7
SEED = 2026
TARGET = 2.0


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


def per_class(fn, levels, rates, medians, betas, p_class, p_site):
    """Damage-state rates of every pair, one call per class (the small axis)."""
    ds = np.empty((len(p_class), N_DS))
    for c in range(N_CLASSES):
        sel = p_class == c
        ds[sel] = fn(levels, rates[p_site[sel]], medians[c], betas[c])
    return ds


def production(levels, rates, medians, betas, mdr, a_site, a_class, n_sites):
    p_class, p_site, inverse = unique_pairs(a_site, a_class, n_sites)
    ds = per_class(damage_state_rates, levels, rates, medians, betas, p_class, p_site)
    return expected_annual_loss(ds, mdr)[inverse]  # broadcast to assets


def measure(n_sites, n_assets, rng):
    levels, rates, medians, betas, mdr, a_site, a_class = synthetic(n_sites, n_assets, rng)
    p_class, p_site, _ = unique_pairs(a_site, a_class, n_sites)
    z = np.random.default_rng(1).standard_normal((len(p_class), N_DS, N_LEVELS))
    out = np.empty_like(z)
    args = (levels, rates, medians, betas, p_class, p_site)
    kernel = per_class(damage_state_rates, *args)
    reference = per_class(damage_state_rates_reference, *args)
    agreement = float(np.max(np.abs(kernel - reference) / reference))
    times = interleaved({
        "ndtr": lambda: ndtr(z, out=out),
        "kernel": lambda: per_class(damage_state_rates, *args),
        "reference": lambda: per_class(damage_state_rates_reference, *args),
        "production": lambda: production(levels, rates, medians, betas, mdr, a_site, a_class, n_sites),
    })
    return len(p_class), times, agreement


def main():
    rng = np.random.default_rng(SEED)
    print("fragility convolution benchmark (synthetic, invented inputs)")
    print(f"{'assets':>9} {'pairs':>7} {'evaluations':>12} {'ndtr s':>8} {'kernel':>7} {'ref':>7} "
          f"{'k/ref':>6} {'prod':>7}  (ratios: medians of interleaved rounds)")
    sizes = [(500, 250_000), (1000, 500_000), (2000, 1_000_000)]
    pairs, kernel_s = [], []
    for n_sites, n_assets in sizes:
        n_pairs, times, agreement = measure(n_sites, n_assets, rng)
        k, r = ratio(times, "kernel", "ndtr"), ratio(times, "reference", "ndtr")
        kr, p = ratio(times, "kernel", "reference"), ratio(times, "production", "ndtr")
        print(f"{n_assets:>9} {n_pairs:>7} {n_pairs * N_DS * N_LEVELS:>12} {np.median(times['ndtr']):>8.4f} "
              f"{k[0]:>7.2f} {r[0]:>7.2f} {kr[0]:>6.2f} {p[0]:>7.2f}")
        pairs.append(n_pairs)
        kernel_s.append(np.median(times["kernel"]))
    print(f"kernel vs reference, largest size: max relative difference {agreement:.1e}")
    slope = np.polyfit(np.log(pairs), np.log(kernel_s), 1)[0]
    print(f"fitted exponent of kernel time vs pairs: {slope:.2f} (linear = 1)")
    row("damage convolution kernel / bare ndtr, N pairs x 4 states x 40 levels", k, TARGET)
    row("tight numpy reference of the same integral / bare ndtr", r)
    row("damage convolution kernel / tight numpy reference", kr)
    row("production path (unique pairs, kernel, EAL, broadcast) / bare ndtr", p)


if __name__ == "__main__":
    main()
