"""Benchmark: classical hazard for 500 sites x 10^4 ruptures x 30 levels.

Run: ``python benchmarks/bench_hazard.py``.

Synthetic invented source model: an area source gridded to about 10^4 ruptures around
500 sites (one IM, PGA, BSSA14, 30 levels, truncation 3 sigma, 200 km cut-off).  The
ratio is the total engine time (cut-off, distances, ground-motion model, exceedance
probabilities, per-site sums) over the time of bare ``scipy.special.ndtr`` on as many
standard-normal values as there are surviving (site, rupture, level) evaluations, in the
engine's own blocking: one call per pass of :func:`quakefolio.core.hazard.hazard_from_pairs`
(same site blocks, same passes, same number of values each, into a reused work array),
target <= 1.3.  Timed side by side in one process, interleaved, median of the per-round
ratios (``timing.py``).  Growth in sites and in ruptures: fitted exponents of time vs size.
"""
from __future__ import annotations

import time

import numpy as np
from scipy.special import ndtr

from quakefolio.core.gmm import get_gmm
from quakefolio.core.hazard import CHUNK_VALUES, compute_site_hazard, pair_index, site_chunks
from quakefolio.core.sources.geometry import site_rupture_mask
from quakefolio.core.sources.mfd import truncated_gr
from quakefolio.core.sources.ruptures import area_source_ruptures

from timing import interleaved, ratio, row

LEVELS = np.geomspace(1e-3, 3.0, 30)
CUTOFF_KM = 200.0
SITE_BLOCK = 64
REF = (10.0, 20.0)
TARGET = 1.3


def sources(spacing_km):
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, bin_width=0.1, rate_above_mmin=0.5)
    poly = [(9.0, 19.0), (11.0, 19.0), (11.0, 21.0), (9.0, 21.0)]
    return area_source_ruptures("zone", poly, spacing_km=spacing_km, mfd=mfd, hypo_depths=[(10.0, 1.0)],
                                mechanisms=[(0.0, 90.0, 0.0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)


def sites(n, rng):
    return rng.uniform(9.7, 10.3, n), rng.uniform(19.7, 20.3, n), rng.uniform(250, 760, n)


def engine(lon, lat, vs30, rs, gmm):
    return compute_site_hazard(lon, lat, vs30, rs, [gmm], ["PGA"], LEVELS, truncation_sigma=3.0,
                               max_distance_km=CUTOFF_KM, site_block=SITE_BLOCK, ref=REF)


def timed(lon, lat, vs30, rs, gmm):
    """CPU time [s] of one engine run (as in ``timing.py``)."""
    t = time.process_time()
    engine(lon, lat, vs30, rs, gmm)
    return time.process_time() - t


def engine_passes(lon, lat, rs):
    """Pairs per pass of the engine: the same site blocks, cut-off and passes of whole sites."""
    chunk = max(1, CHUNK_VALUES // len(LEVELS))
    passes = []
    for lo in range(0, len(lon), SITE_BLOCK):
        blk = slice(lo, lo + SITE_BLOCK)
        mask = site_rupture_mask(lon[blk], lat[blk], rs, CUTOFF_KM, exact=True, ref_lon=REF[0], ref_lat=REF[1])
        _, _, starts, _ = pair_index(mask)
        passes += [last - first for _, _, first, last in site_chunks(starts, int(mask.sum()), chunk)]
    return passes


def blocked_ndtr(passes):
    """Bare ndtr on standard-normal values, one call per engine pass, into a reused array."""
    z = np.random.default_rng(1).standard_normal((max(passes), len(LEVELS)))
    out = np.empty_like(z)

    def run():
        for n in passes:
            ndtr(z[:n], out=out[:n])
    return run


def main():
    rng = np.random.default_rng(5)
    gmm = get_gmm("BSSA14")
    rs = sources(9.9)
    lon, lat, vs30 = sites(500, rng)
    passes = engine_passes(lon, lat, rs)
    n_pairs = sum(passes)
    engine(lon[:10], lat[:10], vs30[:10], rs, gmm)  # warm-up
    times = interleaved({"ndtr": blocked_ndtr(passes), "engine": lambda: engine(lon, lat, vs30, rs, gmm)})
    print("classical hazard benchmark (synthetic, invented source model)")
    print(f"sites 500, ruptures {len(rs)}, levels {len(LEVELS)}, surviving pairs {n_pairs}, "
          f"evaluations {n_pairs * len(LEVELS)}, engine passes {len(passes)} (largest {max(passes)} pairs)")
    print(f"engine {np.median(times['engine']):.3f} s, blocked bare ndtr {np.median(times['ndtr']):.3f} s "
          "(medians)")
    ns = [125, 250, 500]
    ts = [min(timed(lon[:n], lat[:n], vs30[:n], rs, gmm) for _ in range(2)) for n in ns]
    print("time vs sites:", ", ".join(f"{n}: {t:.2f} s" for n, t in zip(ns, ts)),
          f"-> exponent {np.polyfit(np.log(ns), np.log(ts), 1)[0]:.2f}")
    rsets = [sources(s) for s in (19.8, 14.0, 9.9)]
    nr = [len(r) for r in rsets]
    tr = [min(timed(lon[:200], lat[:200], vs30[:200], r, gmm) for _ in range(2)) for r in rsets]
    print("time vs ruptures (200 sites):", ", ".join(f"{n}: {t:.2f} s" for n, t in zip(nr, tr)),
          f"-> exponent {np.polyfit(np.log(nr), np.log(tr), 1)[0]:.2f}")
    row("classical hazard engine / bare ndtr on as many values in the engine's blocking",
        ratio(times, "engine", "ndtr"), TARGET)


if __name__ == "__main__":
    main()
