"""Ruptures: Wells & Coppersmith (1994) dimensions, fault floating, point and area sources."""
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.sources.geometry import aeqd_forward, mean_position
from quakefolio.core.sources.mfd import single_magnitude, truncated_gr
from quakefolio.core.sources.ruptures import (
    RuptureSet,
    area_source_ruptures,
    planar_fault_ruptures,
    point_source_ruptures,
    polygon_grid,
    rupture_corners,
    wc94_dimensions,
)

# Wells & Coppersmith (1994), BSSA 84(4), Table 2A, log10(y) = a + b M, transcribed here
# independently of the module: RA [km^2], RW [km], RLD [km] by slip type.
WC94_RA = {"strike_slip": (-3.42, 0.90), "reverse": (-3.99, 0.98), "normal": (-2.87, 0.82), "all": (-3.49, 0.91)}
WC94_RW = {"strike_slip": (-0.76, 0.27), "reverse": (-1.61, 0.41), "normal": (-1.14, 0.35), "all": (-1.01, 0.32)}
WC94_RLD = {"strike_slip": (-2.57, 0.62), "reverse": (-2.42, 0.58), "normal": (-1.88, 0.50), "all": (-2.44, 0.59)}
RAKE = {"strike_slip": 0.0, "reverse": 90.0, "normal": -90.0, "all": 0.0}


def frame_coords(rups, origin, strike, dip, ref):
    """Corner coordinates (along strike, down dip, normal) [km] in a fault's own frame."""
    th, dl = math.radians(strike), math.radians(dip)
    s = np.array([math.sin(th), math.cos(th), 0.0])
    v = np.array([math.cos(dl) * math.cos(th), -math.cos(dl) * math.sin(th), math.sin(dl)])
    n = np.cross(s, v)
    x, y = aeqd_forward(rups.corners[..., 0], rups.corners[..., 1], *ref)
    rel = np.stack([x, y, rups.corners[..., 2]], axis=-1) - origin
    return rel @ s, rel @ v, rel @ n


# --------------------------------------------------------------------------- #
# Wells & Coppersmith (1994) dimensions
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("kind, mag", [("strike_slip", 7.0), ("reverse", 6.0), ("normal", 6.0), ("all", 6.5)])
def test_uncapped_area_and_width_are_wells_coppersmith(kind, mag):
    # Magnitudes chosen so that L >= W (no aspect cap) and no width limit.
    length, width = wc94_dimensions(mag, RAKE[kind], slip_type="all" if kind == "all" else None)
    a, b = WC94_RA[kind]
    aw, bw = WC94_RW[kind]
    assert length >= width
    assert_allclose(np.log10(length * width), a + b * mag, rtol=1e-12)
    assert_allclose(np.log10(width), aw + bw * mag, rtol=1e-12)


def test_length_relation_uses_subsurface_rupture_length():
    length, width = wc94_dimensions(7.0, 0.0, relation="length")
    assert_allclose(np.log10(length), WC94_RLD["strike_slip"][0] + 7.0 * WC94_RLD["strike_slip"][1], rtol=1e-12)
    assert_allclose(np.log10(length * width), WC94_RA["strike_slip"][0] + 7.0 * WC94_RA["strike_slip"][1], rtol=1e-12)


def test_aspect_ratio_cap_keeps_area():
    # Strike-slip M5: W&C width 10^0.59 = 3.9 km > A / W = 3.1 km, so the cap L/W >= 1 binds.
    area = 10 ** (WC94_RA["strike_slip"][0] + 5.0 * WC94_RA["strike_slip"][1])
    length, width = wc94_dimensions(5.0, 0.0)
    assert_allclose([length / width, length * width], [1.0, area], rtol=1e-12)
    length, width = wc94_dimensions(5.0, 0.0, min_aspect_ratio=2.0)
    assert_allclose([length / width, length * width], [2.0, area], rtol=1e-12)


def test_width_limit_moves_the_excess_area_to_length():
    # Strike-slip M7.5: W&C width 10^1.265 = 18.4 km; seismogenic width 12 km / sin(90).
    area = 10 ** (WC94_RA["strike_slip"][0] + 7.5 * WC94_RA["strike_slip"][1])
    length, width = wc94_dimensions(7.5, 0.0, max_width_km=12.0)
    assert_allclose([width, length * width], [12.0, area], rtol=1e-12)
    length, width = wc94_dimensions(np.array([5.0, 7.5]), 90.0, max_width_km=np.array([20.0, 20.0 / math.sin(1.0)]))
    assert np.all(width <= np.array([20.0, 20.0 / math.sin(1.0)]))


def test_dimensions_reject_bad_arguments():
    with pytest.raises(ValueError, match="relation must be"):
        wc94_dimensions(6.0, 0.0, relation="area")
    with pytest.raises(ValueError, match="slip_type must be one of"):
        wc94_dimensions(6.0, 0.0, slip_type="oblique")


# --------------------------------------------------------------------------- #
# corners
# --------------------------------------------------------------------------- #
def test_rupture_corners_centre_dimensions_and_dip_to_the_right():
    corners = rupture_corners(20.0, 40.0, 8.0, 0.0, 30.0, 16.0, 10.0)[0]
    x, y = aeqd_forward(corners[:, 0], corners[:, 1], 20.0, 40.0)
    p = np.stack([x, y, corners[:, 2]], axis=1)
    assert_allclose(p.mean(axis=0), [0, 0, 8.0], atol=1e-9)  # centred on the given point
    assert_allclose(np.linalg.norm(p[1] - p[0]), 16.0, atol=1e-9)
    assert_allclose(np.linalg.norm(p[3] - p[0]), 10.0, atol=1e-9)
    assert_allclose(p[1, :2] - p[0, :2], [0, 16.0], atol=1e-9)  # strike north
    # dips 30 deg to the east (right of north): bottom edge 10 cos30 east, 10 sin30 deeper
    assert_allclose(p[3] - p[0], [10 * math.cos(math.radians(30)), 0, 5.0], atol=1e-9)
    top = rupture_corners(20.0, 40.0, 0.0, 0.0, 30.0, 16.0, 10.0, downdip_km=0.0)[0]
    assert_allclose(top[:2, 2], 0.0, atol=1e-12)
    with pytest.raises(ValueError, match="above the ground surface"):
        rupture_corners(20.0, 40.0, 1.0, 0.0, 30.0, 16.0, 10.0)


def test_rupture_set_concat_subset_and_validation():
    mfd = single_magnitude(6.0, 0.01)
    kw = dict(mfd=mfd, hypo_depths=[(10.0, 1.0)], mechanisms=[(0.0, 90.0, 0.0, 1.0)],
              upper_depth_km=0.0, lower_depth_km=20.0)
    a = point_source_ruptures("a", 10.0, 45.0, **kw)
    b = point_source_ruptures("b", 11.0, 45.0, **kw)
    both = RuptureSet.concat([a, b])
    assert both.source_ids == ("a", "b") and both.source_index.tolist() == [0, 1] and len(both) == 2
    sub = both.subset(np.array([False, True]))
    assert sub.source_ids == ("a", "b") and sub.source_index.tolist() == [1]
    assert len(RuptureSet.concat([])) == 0
    # ids merge by name: subsets of one set join back into that set
    again = RuptureSet.concat([both.subset(np.array([1])), both.subset(np.array([0])), a])
    assert again.source_ids == ("a", "b") and again.source_index.tolist() == [1, 0, 0]
    with pytest.raises(ValueError, match="duplicate source ids"):
        RuptureSet(**{**{f: getattr(a, f) for f in a.__dataclass_fields__}, "source_ids": ("a", "a")})
    with pytest.raises(ValueError, match="'rate' must be >= 0"):
        RuptureSet(**{**{f: getattr(a, f) for f in a.__dataclass_fields__}, "rate": np.array([-1.0])})
    with pytest.raises(ValueError):
        a.mag[0] = 7.0  # read-only arrays


# --------------------------------------------------------------------------- #
# planar fault
# --------------------------------------------------------------------------- #
FAULT = dict(dip_deg=50.0, upper_depth_km=2.0, lower_depth_km=16.0, rake_deg=90.0)
TRACE = [(23.0, 38.0), (23.2, 38.1), (23.5, 38.25)]


def fault_frame():
    ref = mean_position([TRACE[0][0], TRACE[-1][0]], [TRACE[0][1], TRACE[-1][1]])
    x, y = aeqd_forward([TRACE[0][0], TRACE[-1][0]], [TRACE[0][1], TRACE[-1][1]], *ref)
    strike = math.degrees(math.atan2(x[1] - x[0], y[1] - y[0])) % 360
    th, dl = math.radians(strike), math.radians(FAULT["dip_deg"])
    # the trace is the surface intersection: top of the fault usd / tan(dip) down dip of it
    shift = FAULT["upper_depth_km"] / math.tan(dl)
    origin = np.array([x[0] + shift * math.cos(th), y[0] - shift * math.sin(th), FAULT["upper_depth_km"]])
    length = math.hypot(x[1] - x[0], y[1] - y[0])
    width = (FAULT["lower_depth_km"] - FAULT["upper_depth_km"]) / math.sin(dl)
    return ref, origin, strike, length, width


def test_floating_ruptures_stay_inside_the_fault_plane_and_keep_the_rates():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.6, bin_width=0.2, rate_above_mmin=0.05)
    rups = planar_fault_ruptures("f", TRACE, mfd=mfd, rupture_step_km=2.0, **FAULT)
    ref, origin, strike, fault_length, fault_width = fault_frame()
    along, down, normal = frame_coords(rups, origin, strike, FAULT["dip_deg"], ref)
    tol = 1e-6
    assert np.all((along >= -tol) & (along <= fault_length + tol))
    assert np.all((down >= -tol) & (down <= fault_width + tol))
    assert_allclose(normal, 0.0, atol=tol)  # in the fault plane
    assert np.all((rups.ztor_km >= 2.0 - tol) & (rups.zbot_km <= 16.0 + tol))
    # rates: per magnitude bin equal to the MFD bin, split equally over positions
    for m, r in zip(*mfd):
        sel = np.isclose(rups.mag, m)
        assert_allclose(rups.rate[sel].sum(), r, rtol=1e-12)
        assert_allclose(rups.rate[sel], r / sel.sum(), rtol=1e-12)
    assert_allclose(rups.total_rate, 0.05, rtol=1e-12)
    # positions: spacing at most the step, both fault ends reached
    sel = np.isclose(rups.mag, mfd.mag[0])
    starts = np.unique(np.round(along[sel, 0], 6))
    assert starts[0] == pytest.approx(0.0, abs=tol)
    assert starts[-1] + rups.length_km[sel][0] == pytest.approx(fault_length, abs=1e-5)
    assert np.diff(starts).max() <= 2.0 + 1e-9
    # the largest ruptures are clipped to the fault
    big = np.isclose(rups.mag, mfd.mag[-1])
    assert_allclose(rups.length_km[big], fault_length, rtol=1e-9)
    assert_allclose(rups.width_km[big], fault_width, rtol=1e-9)
    # hypocentre at the centre of each plane
    assert_allclose(rups.zhyp_km, 0.5 * (rups.ztor_km + rups.zbot_km), atol=1e-12)


def test_fault_rejects_a_degenerate_trace():
    with pytest.raises(ValueError, match="at least two"):
        planar_fault_ruptures("f", [(23.0, 38.0)], mfd=single_magnitude(6.0, 0.01), **FAULT)
    with pytest.raises(ValueError, match="coincide"):
        planar_fault_ruptures("f", [(23.0, 38.0), (23.0, 38.0)], mfd=single_magnitude(6.0, 0.01), **FAULT)


# --------------------------------------------------------------------------- #
# point and area sources
# --------------------------------------------------------------------------- #
def test_point_source_weights_and_plane_inside_the_layer():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, bin_width=0.5, rate_above_mmin=0.2)
    depths = [(3.0, 0.2), (10.0, 0.5), (14.0, 0.3)]
    mechs = [(30.0, 90.0, 0.0, 0.6), (120.0, 45.0, -90.0, 0.4)]
    rups = point_source_ruptures("p", 5.0, 50.0, mfd=mfd, hypo_depths=depths, mechanisms=mechs,
                                 upper_depth_km=0.0, lower_depth_km=15.0)
    assert len(rups) == 4 * 3 * 2
    assert_allclose(rups.total_rate, 0.2, rtol=1e-12)
    for (mag, rate) in zip(*mfd):
        for strike, dip, rake, w_m in mechs:
            for zh, w_d in depths:
                sel = np.isclose(rups.mag, mag) & np.isclose(rups.strike_deg, strike) & np.isclose(rups.zhyp_km, zh)
                assert sel.sum() == 1
                assert_allclose(rups.rate[sel], rate * w_m * w_d, rtol=1e-12)
    assert np.all(rups.ztor_km >= -1e-9) and np.all(rups.zbot_km <= 15.0 + 1e-9)
    assert np.all((rups.zhyp_km >= rups.ztor_km - 1e-9) & (rups.zhyp_km <= rups.zbot_km + 1e-9))
    # hypocentre on the plane: its normal offset from the plane through the corners is zero
    x, y = aeqd_forward(rups.corners[..., 0], rups.corners[..., 1], 5.0, 50.0)
    p = np.stack([x, y, rups.corners[..., 2]], axis=-1)
    normal = np.cross(p[:, 1] - p[:, 0], p[:, 3] - p[:, 0])
    hypo = np.stack([np.zeros(len(rups)), np.zeros(len(rups)), rups.zhyp_km], axis=1)
    off = np.einsum("ij,ij->i", hypo - p[:, 0], normal) / np.linalg.norm(normal, axis=1)
    assert_allclose(off, 0.0, atol=1e-6)
    # small ruptures away from the layer bounds are centred on the hypocentre
    small = np.isclose(rups.mag, 5.25) & np.isclose(rups.zhyp_km, 10.0)
    assert_allclose(p[small].mean(axis=1), hypo[small], atol=1e-6)


def test_point_source_rejects_bad_distributions():
    kw = dict(mfd=single_magnitude(6.0, 0.01), upper_depth_km=0.0, lower_depth_km=15.0)
    with pytest.raises(ValueError, match="weights must sum to 1"):
        point_source_ruptures("p", 5.0, 50.0, hypo_depths=[(5.0, 0.5)], mechanisms=[(0, 90, 0, 1.0)], **kw)
    with pytest.raises(ValueError, match="hypocentral depths must lie in"):
        point_source_ruptures("p", 5.0, 50.0, hypo_depths=[(20.0, 1.0)], mechanisms=[(0, 90, 0, 1.0)], **kw)
    with pytest.raises(ValueError, match="mechanism dip must be in"):
        point_source_ruptures("p", 5.0, 50.0, hypo_depths=[(5.0, 1.0)], mechanisms=[(0, 0, 0, 1.0)], **kw)


L_SHAPE = [(0.0, 0.0), (0.4, 0.0), (0.4, 0.1), (0.1, 0.1), (0.1, 0.3), (0.0, 0.3)]  # lon, lat near the equator


def test_area_grid_points_lie_inside_the_polygon_at_the_spacing():
    lon, lat = polygon_grid(L_SHAPE, 1.0)
    # inside the union of the two rectangles making the L (edges straight in lon/lat to
    # ~1e-6 deg at this size and latitude)
    in_foot = (lon > 0) & (lon < 0.4) & (lat > 0) & (lat < 0.1)
    in_stem = (lon > 0) & (lon < 0.1) & (lat > 0) & (lat < 0.3)
    assert np.all(in_foot | in_stem)
    # count close to area / spacing^2, (0.4 x 0.1 + 0.1 x 0.2) deg^2 at 111.19 km/deg, up to a
    # boundary term of order perimeter / spacing (here ~ 5 %)
    expected = (0.04 + 0.02) * 111.19 ** 2 / 1.0
    assert abs(lon.size - expected) / expected < 0.1
    ref = mean_position(lon, lat)
    x, y = aeqd_forward(lon, lat, *ref)
    nearest = np.sort(np.hypot(x[:, None] - x, y[:, None] - y), axis=1)[:, 1]
    assert_allclose(nearest, 1.0, rtol=1e-3)


def test_area_source_rates_sum_to_the_total_and_split_equally():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=6.5, bin_width=0.5, rate_above_mmin=0.3)
    rups = area_source_ruptures("z", L_SHAPE, spacing_km=5.0, mfd=mfd, hypo_depths=[(8.0, 1.0)],
                                mechanisms=[(0.0, 90.0, 0.0, 0.5), (90.0, 60.0, 90.0, 0.5)],
                                upper_depth_km=0.0, lower_depth_km=15.0)
    n_points = polygon_grid(L_SHAPE, 5.0)[0].size
    assert len(rups) == n_points * 3 * 2
    assert_allclose(rups.total_rate, 0.3, rtol=1e-12)
    first = np.isclose(rups.mag, mfd.mag[0]) & np.isclose(rups.strike_deg, 0.0)
    assert_allclose(rups.rate[first], mfd.rate[0] * 0.5 / n_points, rtol=1e-12)
    # a C-shaped outline ~1 km across: the single node at a 5 km spacing falls in its gap
    c_shape = [(0, 0), (0.01, 0), (0.01, 0.001), (0.001, 0.001), (0.001, 0.009), (0.01, 0.009), (0.01, 0.01), (0, 0.01)]
    with pytest.raises(ValueError, match="no grid point"):
        polygon_grid(c_shape, 5.0)
