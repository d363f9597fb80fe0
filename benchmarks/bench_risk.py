"""Benchmark: fragility convolution for a large portfolio, per unique (site, class) pair.

Run: ``python benchmarks/bench_risk.py``.

A synthetic portfolio (invented numbers) of up to 10**6 assets on 2,000 hazard sites with
7 building classes of 4 damage states each, hazard curves of 40 levels. The path timed
is the production one: unique (site, class) pairs, exact damage-state rates per pair
(:func:`quakefolio.core.risk.damage_state_rates`), EAL per pair, broadcast to assets.
The reference is bare ``scipy.special.ndtr`` over the same number of evaluations
(pairs x damage states x levels).  Prints sizes, times, the ratio, and the fitted
exponent of time vs number of pairs (linear growth: about 1).
"""
from __future__ import annotations

import time

import numpy as np
from scipy.special import ndtr

from quakefolio.core.loss import expected_annual_loss
from quakefolio.core.risk import damage_state_rates

N_LEVELS, N_DS, N_CLASSES = 40, 4, 7
SEED = 2026


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


def run(n_sites, n_assets, rng):
    levels, rates, medians, betas, mdr, a_site, a_class = synthetic(n_sites, n_assets, rng)
    t0 = time.perf_counter()
    key = a_class.astype(np.int64) * n_sites + a_site
    uniq, inverse = np.unique(key, return_inverse=True)
    p_class, p_site = uniq // n_sites, uniq % n_sites
    ds = np.empty((len(uniq), N_DS))
    for c in range(N_CLASSES):  # the small axis; pairs of one class in one vectorised call
        sel = p_class == c
        ds[sel] = damage_state_rates(levels, rates[p_site[sel]], medians[c], betas[c])
    eal_ratio = expected_annual_loss(ds, mdr)
    asset_eal = eal_ratio[inverse]  # broadcast to assets
    elapsed = time.perf_counter() - t0
    z = np.random.default_rng(1).standard_normal((len(uniq), N_DS, N_LEVELS))
    t1 = time.perf_counter()
    ndtr(z)
    bare = time.perf_counter() - t1
    assert asset_eal.shape == (n_assets,)
    return len(uniq), elapsed, bare


def main():
    rng = np.random.default_rng(SEED)
    print("fragility convolution benchmark (synthetic, invented inputs)")
    print(f"{'assets':>9} {'sites':>6} {'pairs':>7} {'evaluations':>12} {'time s':>8} {'ndtr s':>8} {'ratio':>6}")
    sizes = [(500, 250_000), (1000, 500_000), (2000, 1_000_000)]
    pairs, times = [], []
    for n_sites, n_assets in sizes:
        n_pairs, t, bare = run(n_sites, n_assets, rng)
        n_eval = n_pairs * N_DS * N_LEVELS
        print(f"{n_assets:>9} {n_sites:>6} {n_pairs:>7} {n_eval:>12} {t:>8.3f} {bare:>8.4f} {t / bare:>6.1f}")
        pairs.append(n_pairs)
        times.append(t)
    slope = np.polyfit(np.log(pairs), np.log(times), 1)[0]
    print(f"fitted exponent of time vs pairs: {slope:.2f} (linear = 1)")
    print("ratio = time of the production path (unique pairs, exact integral, EAL, broadcast) / bare ndtr "
          "over pairs x damage states x levels")


if __name__ == "__main__":
    main()
