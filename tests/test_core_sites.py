"""Hazard sites from asset locations (quakefolio.core.sites): equal, bit for bit, to the
grouped-table implementation the pipeline used before (kept below as the reference)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from conftest import DEMO
from quakefolio.core.sources.geometry import aeqd_forward, aeqd_inverse, mean_position
from quakefolio.core.sites import compensated_group_mean, exact_sites, group_rows, snap_sites
from quakefolio.pipeline.stages.hazard import build_sites


def _reference_build_sites(exposure, spacing_km, default_vs30):
    """The previous pipeline implementation (pandas grouping), the reference of equality."""
    lon = exposure.lon.to_numpy()
    lat = exposure.lat.to_numpy()
    vs30 = exposure.vs30_mps.to_numpy(dtype=float)
    vs30 = np.where(np.isnan(vs30), default_vs30, vs30)
    ref = tuple(round(v, 2) for v in mean_position(lon, lat))
    if spacing_km > 0:
        x, y = aeqd_forward(lon, lat, *ref)
        gx, gy = np.round(x / spacing_km) * spacing_km, np.round(y / spacing_km) * spacing_km
        slon, slat = aeqd_inverse(gx, gy, *ref)
        dist = np.sqrt((x - gx) ** 2 + (y - gy) ** 2)
        key = pd.DataFrame({"lat": np.round(slat, 7), "lon": np.round(slon, 7), "ln_vs30": np.log(vs30)})
        uniq = key.groupby(["lat", "lon"], sort=True, as_index=False)["ln_vs30"].mean()
        uniq["vs30"] = np.exp(uniq.pop("ln_vs30"))
        cols = ["lat", "lon"]
    else:
        dist = np.zeros(len(lon))
        key = pd.DataFrame({"lat": np.round(lat, 7), "lon": np.round(lon, 7), "vs30": vs30})
        uniq = key.drop_duplicates().sort_values(["lat", "lon", "vs30"], kind="stable").reset_index(drop=True)
        cols = ["lat", "lon", "vs30"]
    uniq["site"] = np.arange(len(uniq))
    site_index = key[cols].merge(uniq[cols + ["site"]], on=cols, how="left")["site"].to_numpy()
    width = max(4, len(str(len(uniq))))
    ids = np.array([f"H{i + 1:0{width}d}" for i in range(len(uniq))])
    return ids, uniq.lon.to_numpy(), uniq.lat.to_numpy(), uniq.vs30.to_numpy(), site_index, dist, ref


def _assert_bitwise(got, want):
    assert got[6] == want[6]
    assert_array_equal(got[0], want[0])
    for g, w in zip(got[1:6], want[1:6]):
        assert g.shape == w.shape
        assert g.tobytes() == np.asarray(w, dtype=g.dtype).tobytes()
    assert got[4].dtype == np.asarray(want[4]).dtype


def _random_exposure(rng, n, clustered):
    centre = rng.uniform(-170, 170), rng.uniform(-60, 60)
    spread = 0.05 if clustered else 0.5
    lon = centre[0] + rng.normal(0, spread, n)
    lat = centre[1] + rng.normal(0, spread, n)
    if clustered:  # many assets on few exact positions, with their own Vs30 values
        pick = rng.integers(0, max(1, n // 20), n)
        lon, lat = lon[pick], lat[pick]
    vs30 = rng.lognormal(np.log(450), 0.4, n)
    vs30[rng.random(n) < 0.2] = np.nan
    return pd.DataFrame({"lon": lon, "lat": lat, "vs30_mps": vs30})


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("spacing_km", [0.0, 0.5, 2.0, 7.3])
def test_sites_equal_the_grouped_table_reference_on_random_inputs(seed, spacing_km):
    rng = np.random.default_rng(seed)
    ex = _random_exposure(rng, int(rng.integers(1, 3000)), clustered=seed % 2 == 1)
    _assert_bitwise(build_sites(ex, spacing_km, 760.0), _reference_build_sites(ex, spacing_km, 760.0))


@pytest.mark.parametrize("spacing_km", [0.0, 2.0])
def test_sites_equal_the_reference_on_the_demo(spacing_km):
    ex = pd.read_csv(DEMO / "exposure.csv")
    if "vs30_mps" not in ex:
        ex["vs30_mps"] = np.nan
    _assert_bitwise(build_sites(ex, spacing_km, 760.0), _reference_build_sites(ex, spacing_km, 760.0))


def test_compensated_group_mean():
    rng = np.random.default_rng(3)
    group = rng.integers(0, 7, 500)
    values = rng.normal(5.0, 1.0, 500)
    want = np.array([values[group == g].mean() for g in range(7)])
    assert_allclose(compensated_group_mean(values, group, 7), want, rtol=1e-15)
    # compensation recovers what a plain sum loses: 1 + 1e-16 * 1000 terms
    v = np.concatenate([[1.0], np.full(1000, 1e-16)])
    assert compensated_group_mean(v, np.zeros(1001, dtype=int), 1)[0] == (1.0 + 1e-13) / 1001


def test_group_rows_and_site_layout():
    first, group = group_rows(np.array([2.0, 1.0, 2.0, 1.0]), np.array([0.0, 5.0, 0.0, 4.0]))
    assert_array_equal(first, [3, 1, 0])
    assert_array_equal(group, [2, 1, 2, 0])
    lon, lat, vs30, idx, dist = exact_sites(np.array([10.0, 10.0, 11.0]), np.array([45.0, 45.0, 45.0]),
                                            np.array([300.0, 300.0, 500.0]))
    assert_array_equal(lon, [10.0, 11.0])
    assert_array_equal(idx, [0, 0, 1])
    assert not dist.any()
    lon, lat, vs30, idx, dist = snap_sites(np.array([10.0, 10.001]), np.array([45.0, 45.0]),
                                           np.array([300.0, 1200.0]), 5.0, (10.0, 45.0))
    assert len(lon) == 1 and idx.tolist() == [0, 0]
    assert_allclose(vs30, [600.0], rtol=1e-14)  # geometric mean
    assert_allclose(dist, [0.0, 0.0787], atol=1e-3)  # 0.001 deg of longitude at 45 N
    with pytest.raises(ValueError, match="spacing_km must be positive"):
        snap_sites(lon, lat, vs30, 0.0, (10.0, 45.0))
