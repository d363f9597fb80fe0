"""Site-to-rupture distances: hand-worked geometry, brute force, projection, cut-off mask.

Distance definitions: Ancheta et al. (2014), Earthquake Spectra 30(3) (NGA-West2 database)
and Kaklamanos, Baise & Boore (2011), Earthquake Spectra 27(4): Rrup closest distance to
the plane, Rjb closest horizontal distance to its surface projection, Rx horizontal
distance from the top edge (extended) perpendicular to strike, positive on the hanging
wall, Ry0 horizontal distance off the ends parallel to strike.
"""
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.geo import great_circle_km
from quakefolio.core.sources.geometry import (
    aeqd_forward,
    aeqd_inverse,
    pair_distances,
    points_in_polygon,
    rupture_distances,
    site_rupture_mask,
)
from quakefolio.core.sources.ruptures import RuptureSet

REF = (12.0, 45.0)  # projection centre of the km-frame tests (lon, lat) [deg]


def rect_km(x0, y0, ztor, strike, dip, length, width):
    """Corners (4, 3) in km (east, north, depth) of a rectangle, built by hand."""
    th, dl = math.radians(strike), math.radians(dip)
    s = np.array([math.sin(th), math.cos(th), 0.0])
    v = np.array([math.cos(dl) * math.cos(th), -math.cos(dl) * math.sin(th), math.sin(dl)])
    p0 = np.array([x0, y0, ztor])
    return np.array([p0, p0 + length * s, p0 + length * s + width * v, p0 + width * v])


def ruptures_from_km(rects, params, ref=REF):
    """A RuptureSet whose corners are the km-frame rectangles mapped to lon/lat about ``ref``."""
    rects = np.asarray(rects)
    lon, lat = aeqd_inverse(rects[..., 0], rects[..., 1], *ref)
    corners = np.stack([lon, lat, rects[..., 2]], axis=-1)
    p = np.asarray(params, dtype=float)  # ztor, strike, dip, length, width
    n = len(rects)
    return RuptureSet(
        source_index=np.zeros(n, dtype=int), source_ids=("s",), mag=np.full(n, 6.5), rate=np.full(n, 1e-3),
        strike_deg=p[:, 1] % 360, dip_deg=p[:, 2], rake_deg=np.zeros(n), ztor_km=p[:, 0],
        zbot_km=p[:, 0] + p[:, 4] * np.sin(np.radians(p[:, 2])), width_km=p[:, 4], length_km=p[:, 3],
        zhyp_km=p[:, 0] + 0.5 * p[:, 4] * np.sin(np.radians(p[:, 2])), corners=corners,
    )


def one(x0, y0, ztor, strike, dip, length, width):
    return ruptures_from_km([rect_km(x0, y0, ztor, strike, dip, length, width)], [[ztor, strike, dip, length, width]])


def dist_at(rup, xy_km):
    xy = np.asarray(xy_km, dtype=float)
    lon, lat = aeqd_inverse(xy[:, 0], xy[:, 1], *REF)
    d = rupture_distances(lon, lat, rup, ref_lon=REF[0], ref_lat=REF[1])
    return {k: v[:, 0] for k, v in d.items()}


# --------------------------------------------------------------------------- #
# projection
# --------------------------------------------------------------------------- #
def test_aeqd_is_exact_from_the_centre_and_inverts():
    # Azimuthal equidistant (Snyder 1987, ch. 25): distance from the centre is the
    # great-circle distance; haversine (Sinnott 1984) as the reference.
    rng = np.random.default_rng(1)
    lon = REF[0] + rng.uniform(-6, 6, 200)
    lat = REF[1] + rng.uniform(-5, 5, 200)
    x, y = aeqd_forward(lon, lat, *REF)
    assert_allclose(np.hypot(x, y), great_circle_km(REF[0], REF[1], lon, lat), rtol=1e-10)
    back_lon, back_lat = aeqd_inverse(x, y, *REF)
    assert_allclose(back_lon, lon, atol=1e-10)
    assert_allclose(back_lat, lat, atol=1e-10)
    # due east at the centre's latitude: azimuth 90 deg, so y ~ 0 only at the centre itself
    x1, y1 = aeqd_forward(REF[0], REF[1] + 1.0, *REF)
    assert abs(float(x1)) < 1e-9 and float(y1) > 0


def test_points_in_polygon_concave():
    # An L-shaped polygon; ray casting (even-odd rule).
    poly = np.array([[0, 0], [4, 0], [4, 1], [1, 1], [1, 3], [0, 3]], dtype=float)
    pts = np.array([[0.5, 0.5], [3.5, 0.5], [0.5, 2.5], [2.0, 2.0], [5, 0.5], [-1, 1], [3.9, 0.99]])
    assert points_in_polygon(pts[:, 0], pts[:, 1], poly[:, 0], poly[:, 1]).tolist() == [
        True, True, True, False, False, False, True]


# --------------------------------------------------------------------------- #
# hand-worked geometry
# --------------------------------------------------------------------------- #
def test_vertical_strike_slip_plane_by_hand():
    # Strike north from (0, 0), L = 20 km, W = 10 km, ztor = 3 km, dip 90.
    rup = one(0.0, 0.0, 3.0, 0.0, 90.0, 20.0, 10.0)
    d = dist_at(rup, [[5, 10], [-5, 10], [0, 26], [4, -3], [0, 10]])
    # beside the middle: Rjb = 5, Rrup = sqrt(Rjb^2 + ztor^2), Rx = +5 east (right of strike)
    # and -5 west, Ry0 = 0
    assert_allclose(d["rjb_km"][:2], [5, 5], atol=1e-9)
    assert_allclose(d["rrup_km"][:2], math.sqrt(25 + 9), atol=1e-9)
    assert_allclose(d["rx_km"][:2], [5, -5], atol=1e-9)
    assert_allclose(d["ry0_km"][:2], 0, atol=1e-9)
    # off the end, on the strike line: Ry0 = Rjb = 6, Rrup = sqrt(Rjb^2 + ztor^2)
    assert_allclose([d["ry0_km"][2], d["rjb_km"][2], d["rrup_km"][2]], [6, 6, math.sqrt(36 + 9)], atol=1e-9)
    # off the start corner diagonally: Ry0 = 3, Rjb = 5 (3-4-5), Rrup = sqrt(25 + 9)
    assert_allclose([d["ry0_km"][3], d["rjb_km"][3], d["rrup_km"][3]], [3, 5, math.sqrt(34)], atol=1e-9)
    # on the trace: Rjb = 0, Rrup = ztor
    assert_allclose([d["rjb_km"][4], d["rrup_km"][4], d["rx_km"][4]], [0, 3, 0], atol=1e-9)


def test_dipping_plane_hanging_wall_and_footwall_by_hand():
    # Strike north, dip 45 to the east, ztor = 2 km, W = 10 km, L = 20 km. The surface
    # projection spans 0 <= x <= 10 cos 45 = 7.071 km; the plane passes through (x, z) = (0, 2)
    # with unit down-dip vector (cos 45, sin 45).
    rup = one(0.0, 0.0, 2.0, 0.0, 45.0, 20.0, 10.0)
    c = math.cos(math.radians(45))
    d = dist_at(rup, [[3, 10], [-4, 10], [10, 10], [20, 10], [3, 25]])
    # hanging wall above the projection: Rjb = 0; Rrup = perpendicular distance to the plane
    # |3 sin45 + 2 cos45| = 5/sqrt(2) (foot of perpendicular at 0.707 km down dip, inside)
    assert_allclose([d["rjb_km"][0], d["rrup_km"][0], d["rx_km"][0], d["ry0_km"][0]], [0, 5 * c, 3, 0], atol=1e-9)
    # footwall: Rx = -4 < 0, Rjb = 4, closest point the top edge: Rrup = sqrt(16 + 4)
    assert_allclose([d["rx_km"][1], d["rjb_km"][1], d["rrup_km"][1]], [-4, 4, math.sqrt(20)], atol=1e-9)
    # hanging wall beyond the projection: Rjb = 10 - 7.071; foot of perpendicular at
    # (10 - 2) cos45 = 5.66 km down dip (inside), Rrup = (10 + 2) sin45
    assert_allclose([d["rjb_km"][2], d["rrup_km"][2], d["rx_km"][2]], [10 - 10 * c, 12 * c, 10], atol=1e-9)
    # far hanging wall: closest point the bottom edge at (7.071, depth 9.071)
    assert_allclose(d["rrup_km"][3], math.hypot(20 - 10 * c, 2 + 10 * c), atol=1e-9)
    # off the end (Ry0 = 5) above the projection: Rjb = 5, Rrup = sqrt(5^2 + (5/sqrt 2)^2)
    assert_allclose([d["ry0_km"][4], d["rjb_km"][4], d["rrup_km"][4]], [5, 5, math.sqrt(25 + 12.5)], atol=1e-9)


def test_rx_sign_follows_the_dip_direction_for_any_strike():
    # Strike 120 deg: the plane dips toward azimuth 210 deg (right of strike, Aki-Richards).
    rup = one(0.0, 0.0, 1.0, 120.0, 30.0, 15.0, 8.0)
    az = math.radians(210.0)
    hw = 5.0 * np.array([math.sin(az), math.cos(az)]) + 7.5 * np.array([math.sin(math.radians(120)), math.cos(math.radians(120))])
    fw = -hw + 2 * 7.5 * np.array([math.sin(math.radians(120)), math.cos(math.radians(120))])
    d = dist_at(rup, [hw, fw])
    assert_allclose(d["rx_km"], [5.0, -5.0], atol=1e-9)
    assert_allclose(d["ry0_km"], [0.0, 0.0], atol=1e-9)


# --------------------------------------------------------------------------- #
# brute force on random rectangles
# --------------------------------------------------------------------------- #
def zoom_min(dist_fn, n_sites, n=41, levels=5):
    """Minimum of dist_fn(s, t) over [0, 1]^2 by dense grids, each zooming on the last minimum.

    The distance from a point to an affinely parameterised rectangle (or its projection)
    is convex in (s, t) with axis-aligned level sets, so the grid minimum lies within one
    cell of the true one and the zoom keeps it; 5 levels of 41 x 41 points reach a
    parameter spacing of ~1e-6.
    """
    lo = np.zeros((n_sites, 2))
    hi = np.ones((n_sites, 2))
    u = np.linspace(0.0, 1.0, n)
    for _ in range(levels):
        s = lo[:, 0:1, None] + (hi - lo)[:, 0:1, None] * u[None, :, None]  # (sites, n, 1)
        t = lo[:, 1:2, None] + (hi - lo)[:, 1:2, None] * u[None, None, :]  # (sites, 1, n)
        d = dist_fn(s, t)  # (sites, n, n)
        flat = d.reshape(n_sites, -1)
        k = flat.argmin(axis=1)
        i, j = np.unravel_index(k, (n, n))
        best = flat[np.arange(n_sites), k]
        cs = s[np.arange(n_sites), i, 0]
        ct = t[np.arange(n_sites), 0, j]
        step = (hi - lo) / (n - 1)
        centre = np.stack([cs, ct], axis=1)
        lo = np.clip(centre - 2 * step, 0.0, 1.0)
        hi = np.clip(centre + 2 * step, 0.0, 1.0)
    return best


def test_distances_match_brute_force_on_random_rectangles():
    rng = np.random.default_rng(20240611)
    rects, params = [], []
    for k in range(12):
        ztor = 0.0 if k % 4 == 0 else rng.uniform(0, 8)
        dip = 90.0 if k % 5 == 0 else rng.uniform(10, 89)
        p = [ztor, rng.uniform(0, 360), dip, rng.uniform(2, 40), rng.uniform(2, 20)]
        rects.append(rect_km(rng.uniform(-20, 20), rng.uniform(-20, 20), *p))
        params.append(p)
    rects = np.array(rects)
    rup = ruptures_from_km(rects, params)
    sites = np.vstack([rng.uniform(-60, 60, (14, 2)), rects[:, :, :2].mean(axis=1)[:6]])  # some above planes
    lon, lat = aeqd_inverse(sites[:, 0], sites[:, 1], *REF)
    got = rupture_distances(lon, lat, rup, ref_lon=REF[0], ref_lat=REF[1])
    n_sites = len(sites)
    for r, corners in enumerate(rects):
        p0, p1, _, p3 = corners
        e1, e2 = p1 - p0, p3 - p0

        def rrup(s, t):
            # dense sampling of the rectangle p0 + s e1 + t e2; sites at depth 0
            x = p0[0] + s * e1[0] + t * e2[0] - sites[:, 0, None, None]
            y = p0[1] + s * e1[1] + t * e2[1] - sites[:, 1, None, None]
            z = p0[2] + s * e1[2] + t * e2[2]
            return np.sqrt(x * x + y * y + z * z)

        def rjb(s, t):
            # dense sampling of the projected quadrilateral (horizontal components only)
            x = p0[0] + s * e1[0] + t * e2[0] - sites[:, 0, None, None]
            y = p0[1] + s * e1[1] + t * e2[1] - sites[:, 1, None, None]
            return np.sqrt(x * x + y * y)

        assert_allclose(got["rrup_km"][:, r], zoom_min(rrup, n_sites), atol=1e-3)
        assert_allclose(got["rjb_km"][:, r], zoom_min(rjb, n_sites), atol=1e-3)
        # Rx: signed distance from the top-edge line, positive on the side the plane dips to
        u = e1[:2] / np.linalg.norm(e1[:2])
        rel = sites - p0[:2]
        side = np.sign(np.dot(e2[:2], [u[1], -u[0]])) if params[r][2] < 90 else 1.0
        assert_allclose(got["rx_km"][:, r], side * (rel[:, 0] * u[1] - rel[:, 1] * u[0]), atol=1e-6)
        along = rel @ u
        ry0 = np.maximum(0.0, np.maximum(-along, along - np.linalg.norm(e1[:2])))
        assert_allclose(got["ry0_km"][:, r], ry0, atol=1e-6)


def test_pair_distances_equal_the_dense_ones():
    rng = np.random.default_rng(7)
    rects = [rect_km(rng.uniform(-10, 10), rng.uniform(-10, 10), 1.0, s, 60.0, 12.0, 6.0) for s in (10, 200, 300)]
    rup = ruptures_from_km(rects, [[1.0, s, 60.0, 12.0, 6.0] for s in (10, 200, 300)])
    lon, lat = aeqd_inverse(rng.uniform(-50, 50, 9), rng.uniform(-50, 50, 9), *REF)
    dense = rupture_distances(lon, lat, rup)
    si, ri = np.array([0, 3, 8, 8]), np.array([2, 0, 1, 2])
    pairs = pair_distances(lon, lat, rup, si, ri)
    for key in dense:
        assert_allclose(pairs[key], dense[key][si, ri], rtol=0, atol=1e-12)


def test_reference_point_changes_results_only_within_the_stated_error():
    # Module notes: error ~ d rho^2 / (6 R^2); here d < 60 km, rho < 100 km -> < 2.5e-3 km.
    rup = one(0.0, 0.0, 2.0, 30.0, 50.0, 25.0, 12.0)
    lon, lat = aeqd_inverse(np.array([5.0, -20, 40]), np.array([8.0, 30, -25]), *REF)
    a = rupture_distances(lon, lat, rup, ref_lon=REF[0], ref_lat=REF[1])
    b = rupture_distances(lon, lat, rup, ref_lon=REF[0] + 0.8, ref_lat=REF[1] - 0.5)
    for key in a:
        assert_allclose(a[key], b[key], atol=2.5e-3)


# --------------------------------------------------------------------------- #
# integration-distance mask
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("metric, key", [("rjb", "rjb_km"), ("rrup", "rrup_km")])
def test_mask_keeps_every_pair_within_the_distance(metric, key):
    rng = np.random.default_rng(3)
    params = [[rng.uniform(0, 6), rng.uniform(0, 360), rng.uniform(20, 90), rng.uniform(3, 50), rng.uniform(3, 15)]
              for _ in range(40)]
    rects = [rect_km(rng.uniform(-150, 150), rng.uniform(-150, 150), *p) for p in params]
    rup = ruptures_from_km(rects, params)
    lon, lat = aeqd_inverse(rng.uniform(-150, 150, 60), rng.uniform(-150, 150, 60), *REF)
    dist = rupture_distances(lon, lat, rup)[key]
    cheap = site_rupture_mask(lon, lat, rup, 80.0, metric=metric)
    exact = site_rupture_mask(lon, lat, rup, 80.0, metric=metric, exact=True)
    within = dist <= 80.0
    assert np.all(cheap[within])  # a superset: nothing within the distance is lost
    assert np.array_equal(exact, within)
    assert cheap.sum() < cheap.size  # and it does cut


def test_mask_and_distances_reject_bad_input():
    rup = one(0.0, 0.0, 2.0, 0.0, 45.0, 20.0, 10.0)
    with pytest.raises(ValueError, match="max_distance_km must be > 0"):
        site_rupture_mask([12.0], [45.0], rup, 0.0)
    with pytest.raises(ValueError, match="metric must be"):
        site_rupture_mask([12.0], [45.0], rup, 100.0, metric="repi")
    with pytest.raises(ValueError, match="latitudes must be in"):
        rupture_distances([12.0], [95.0], rup)
    with pytest.raises(ValueError, match="both ref_lon and ref_lat"):
        rupture_distances([12.0], [45.0], rup, ref_lon=12.0)
