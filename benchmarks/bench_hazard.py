"""Benchmark: classical hazard for 500 sites x 10^4 ruptures x 30 levels.

Run: ``python benchmarks/bench_hazard.py``.

Synthetic invented source model: an area source gridded to about 10^4 ruptures around
500 sites (one IM, PGA, BSSA14, 30 levels, truncation 3 sigma, 200 km cut-off).  The
ratio is the total engine time (cut-off, distances, ground-motion model, exceedance
probabilities, per-site sums) over the time of bare ``scipy.special.ndtr`` on as many
standard-normal values as there are surviving (site, rupture, level) evaluations
(target <= 1.5).  Growth in sites and in ruptures: fitted exponents of time vs size.
"""
from __future__ import annotations

import time

import numpy as np
from scipy.special import ndtr

from quakefolio.core.sources.geometry import site_rupture_mask
from quakefolio.core.gmm import get_gmm
from quakefolio.core.hazard import compute_site_hazard
from quakefolio.core.sources.mfd import truncated_gr
from quakefolio.core.sources.ruptures import area_source_ruptures

LEVELS = np.geomspace(1e-3, 3.0, 30)
CUTOFF_KM = 200.0


def sources(spacing_km):
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, bin_width=0.1, rate_above_mmin=0.5)
    poly = [(9.0, 19.0), (11.0, 19.0), (11.0, 21.0), (9.0, 21.0)]
    return area_source_ruptures("zone", poly, spacing_km=spacing_km, mfd=mfd, hypo_depths=[(10.0, 1.0)],
                                mechanisms=[(0.0, 90.0, 0.0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)


def sites(n, rng):
    return rng.uniform(9.7, 10.3, n), rng.uniform(19.7, 20.3, n), rng.uniform(250, 760, n)


def timed(lon, lat, vs30, rs, gmm):
    t = time.perf_counter()
    compute_site_hazard(lon, lat, vs30, rs, [gmm], ["PGA"], LEVELS, truncation_sigma=3.0,
                        max_distance_km=CUTOFF_KM, site_block=64, ref=(10.0, 20.0))
    return time.perf_counter() - t


def main():
    rng = np.random.default_rng(5)
    gmm = get_gmm("BSSA14")
    rs = sources(9.9)
    lon, lat, vs30 = sites(500, rng)
    n_pairs = int(site_rupture_mask(lon, lat, rs, CUTOFF_KM, exact=True, ref_lon=10.0, ref_lat=20.0).sum())
    n_eval = n_pairs * len(LEVELS)
    timed(lon[:10], lat[:10], vs30[:10], rs, gmm)  # warm-up
    total = min(timed(lon, lat, vs30, rs, gmm) for _ in range(2))
    z = np.random.default_rng(1).standard_normal(n_eval)
    t = time.perf_counter()
    ndtr(z)
    bare = time.perf_counter() - t
    print("classical hazard benchmark (synthetic, invented source model)")
    print(f"sites 500, ruptures {len(rs)}, levels {len(LEVELS)}, surviving pairs {n_pairs}, evaluations {n_eval}")
    print(f"engine {total:.3f} s, bare ndtr on as many standard-normal values {bare:.3f} s, "
          f"ratio {total / bare:.2f} (target <= 1.5)")
    ns = [125, 250, 500]
    ts = [min(timed(lon[:n], lat[:n], vs30[:n], rs, gmm) for _ in range(2)) for n in ns]
    print("time vs sites:", ", ".join(f"{n}: {t:.2f} s" for n, t in zip(ns, ts)),
          f"-> exponent {np.polyfit(np.log(ns), np.log(ts), 1)[0]:.2f}")
    rsets = [sources(s) for s in (19.8, 14.0, 9.9)]
    nr = [len(r) for r in rsets]
    tr = [min(timed(lon[:200], lat[:200], vs30[:200], r, gmm) for _ in range(2)) for r in rsets]
    print("time vs ruptures (200 sites):", ", ".join(f"{n}: {t:.2f} s" for n, t in zip(nr, tr)),
          f"-> exponent {np.polyfit(np.log(nr), np.log(tr), 1)[0]:.2f}")


if __name__ == "__main__":
    main()
