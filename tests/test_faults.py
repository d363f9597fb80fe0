"""Bent faults: ruptures floating along a trace of several segments, exact distances to the
multi-plane surface, generalized coordinates for Rx and Ry0, and ruptures larger than their fault.

Checks and their sources:

* Rrup and Rjb of every rupture of a three-segment fault against a brute-force minimum over a
  mesh of the rupture's surface built here from the trace (each segment's plane dipping to its
  right, Aki & Richards convention), refined by zooming (the distance to one rectangle is convex
  in its two parameters): 1 m.
* Rx and Ry0 against the generalized coordinates of Spudich & Chiou (2015, USGS Open-File Report
  2015-1028), their segment weights integrated here by quadrature (scipy.integrate.quad) over
  top edges built from the trace; and the sign conventions of the NGA-West2 database (Ancheta et
  al. 2014, Earthquake Spectra 30(3)): Rx positive on the hanging wall, Ry0 zero within the
  rupture's along-strike extent and positive beyond its ends.
* A bent trace whose points lie on one straight line gives the planar fault's ruptures, distances
  and hazard (the two constructions must agree).
"""
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.integrate import quad

from quakefolio.core.errors import InputError
from quakefolio.core.gmm import get_gmm
from quakefolio.core.hazard import compute_site_hazard
from quakefolio.core.sources.counts import fault_rupture_count
from quakefolio.core.sources.faults import fault_ruptures, rupture_fit
from quakefolio.core.sources.geometry import (
    aeqd_forward, aeqd_inverse, mean_position, pair_distances, rupture_distances, site_rupture_mask,
)
from quakefolio.core.sources.mfd import single_magnitude, truncated_gr
from quakefolio.core.sources.planes import generalized_coordinates
from quakefolio.core.sources.ruptures import RuptureSet, fault_frame, planar_fault_ruptures
from quakefolio.pipeline.io.source_model import load_source_model

from conftest import MINI
from test_geometry import zoom_min

# Three segments: the trace turns left by about 20 degrees, then right by about 45.
TRACE = [(12.0, 45.0), (12.25, 45.05), (12.45, 45.2), (12.7, 45.22)]
DIP, USD, LSD, RAKE = 45.0, 1.0, 14.0, 90.0
STEP = 3.0


class Trace:
    """The trace in the fault's projection, rebuilt here: points, segment lengths and frames."""

    def __init__(self, trace=TRACE):
        lon, lat = np.array(trace).T
        self.ref = mean_position(lon, lat)
        x, y = aeqd_forward(lon, lat, *self.ref)
        self.p = np.c_[x, y]
        seg = np.diff(self.p, axis=0)
        self.ell = np.hypot(seg[:, 0], seg[:, 1])
        self.start = np.r_[0.0, np.cumsum(self.ell)[:-1]]
        self.length = float(self.ell.sum())
        self.s = seg / self.ell[:, None]  # unit vectors along each segment
        self.n = np.c_[self.s[:, 1], -self.s[:, 0]]  # to the right: the dip direction
        self.sd, self.cd = math.sin(math.radians(DIP)), math.cos(math.radians(DIP))
        self.width = (LSD - USD) / self.sd

    def point(self, i, along, down):
        """(x, y, depth) [km] of segment i's plane, ``along`` from the segment start and ``down`` below
        the top of the fault (the upper depth), both measured in the plane."""
        reach = USD / self.sd + down  # down dip from the trace
        xy = self.p[i] + along * self.s[i] + reach * self.cd * self.n[i]
        return np.r_[xy, reach * self.sd]

    def parts(self, a, length):
        """(segment, start, end) along each segment [km] of the span [a, a + length] of the trace."""
        out = []
        for i, (s0, ell) in enumerate(zip(self.start, self.ell)):
            lo, hi = max(a, s0), min(a + length, s0 + ell)
            if hi - lo > 1e-9:
                out.append((i, lo - s0, hi - s0))
        return out

    def offsets(self, length, width):
        """Floating offsets along the trace and down dip: n = ceil(room / step) + 1, both ends reached."""
        def spread(room):
            return np.zeros(1) if room <= 1e-9 else np.linspace(0, room, int(math.ceil(room / STEP - 1e-9)) + 1)

        dd, aa = np.meshgrid(spread(self.width - width), spread(self.length - length), indexing="ij")
        return aa.ravel(), dd.ravel()


def bent(mfd, trace=TRACE, **kw):
    return fault_ruptures("bent", trace, dip_deg=DIP, upper_depth_km=USD, lower_depth_km=LSD, rake_deg=RAKE,
                          mfd=mfd, rupture_step_km=STEP, **kw)


def sites_km(tr, rng):
    """Random sites around the fault, the bend points, and points beside each bend."""
    box = rng.uniform(tr.p.min(axis=0) - 25.0, tr.p.max(axis=0) + 25.0, (24, 2))
    beside = [tr.p[k] + sign * 6.0 * (tr.n[min(k, 2)] + tr.n[max(k - 1, 0)]) / 2 for k in (1, 2) for sign in (1, -1)]
    above = [tr.point(i, 0.5 * tr.ell[i], 3.0)[:2] for i in range(3)]
    return np.vstack([box, tr.p, beside, above])


# --------------------------------------------------------------------------- #
# ruptures along the whole trace
# --------------------------------------------------------------------------- #
def test_ruptures_float_along_the_whole_trace_across_the_joints():
    tr = Trace()
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.0, bin_width=0.2, rate_above_mmin=0.05)
    rs = bent(mfd)
    count = fault_rupture_count("bent", TRACE, dip_deg=DIP, upper_depth_km=USD, lower_depth_km=LSD, rake_deg=RAKE,
                                mags=mfd.mag, rupture_step_km=STEP)
    assert count.n_ruptures == len(rs) and count.length_km == pytest.approx(tr.length, rel=1e-12)
    for m, r in zip(*mfd):  # each bin's rate, split equally over its positions
        sel = np.isclose(rs.mag, m)
        assert_allclose(rs.rate[sel], r / sel.sum(), rtol=1e-12)
    n_pieces = rs.n_pieces
    assert set(np.unique(n_pieces)) == {0, 2, 3}  # on one segment, across one joint, across both
    # length along the trace = summed length of the pieces' top edges
    x, y = aeqd_forward(rs.piece_corners[:, :2, 0], rs.piece_corners[:, :2, 1], *tr.ref)
    summed = np.bincount(rs.piece_rupture, weights=np.hypot(x[:, 1] - x[:, 0], y[:, 1] - y[:, 0]))
    multi = n_pieces > 0
    assert_allclose(summed[multi], rs.length_km[multi], rtol=1e-9)
    # each piece's top edge lies ztor / tan(dip) to the right of its segment, and within it along the trace
    ztor = rs.ztor_km[rs.piece_rupture]
    shift = ztor / math.tan(math.radians(DIP))
    for ends in ((x[:, 0], y[:, 0]), (x[:, 1], y[:, 1])):
        rel = np.c_[ends] [:, :, None] - tr.p[:3].T[None]  # (pieces, 2, segments)
        normal = np.einsum("pks,sk->ps", rel, tr.n)
        along = np.einsum("pks,sk->ps", rel, tr.s)
        on = (np.abs(normal - shift[:, None]) < 1e-6) & (along > -1e-6) & (along < tr.ell + 1e-6)
        assert np.all(on.any(axis=1))
    # on the top row of a magnitude, the first rupture starts at the trace start, the last ends at its end
    top_row = np.nonzero(np.isclose(rs.mag, mfd.mag[-1]) & np.isclose(rs.ztor_km, USD))[0]
    cx, cy = aeqd_forward(rs.corners[top_row, :2, 0], rs.corners[top_row, :2, 1], *tr.ref)
    assert np.hypot(cx[0, 0] - tr.point(0, 0.0, 0.0)[0], cy[0, 0] - tr.point(0, 0.0, 0.0)[1]) < 1e-6
    assert np.hypot(cx[-1, 1] - tr.point(2, tr.ell[2], 0.0)[0], cy[-1, 1] - tr.point(2, tr.ell[2], 0.0)[1]) < 1e-6


def test_subset_and_concat_carry_the_pieces():
    rs = bent(single_magnitude(6.6, 0.01))
    idx = np.array([len(rs) - 1, 0, 7, len(rs) - 1])
    sub = rs.subset(idx)
    assert_allclose(sub.n_pieces, rs.n_pieces[idx])
    lon, lat = aeqd_inverse(np.linspace(-30, 30, 5), np.linspace(-20, 20, 5), *Trace().ref)
    full = rupture_distances(lon, lat, rs)
    part = rupture_distances(lon, lat, sub)
    for key in full:
        assert_allclose(part[key], full[key][:, idx], rtol=0, atol=1e-12)
    both = RuptureSet.concat([sub, rs])
    assert_allclose(both.n_pieces, np.r_[sub.n_pieces, rs.n_pieces])
    joined = rupture_distances(lon, lat, both)
    for key in full:
        assert_allclose(joined[key][:, len(sub):], full[key], rtol=0, atol=1e-12)
    mask = rs.subset(rs.n_pieces > 0)
    assert len(mask) == int((rs.n_pieces > 0).sum()) and mask.n_pieces.min() >= 2
    with pytest.raises(ValueError, match="at least two"):
        RuptureSet(**{**{f: getattr(rs, f) for f in ("source_index", "source_ids", "mag", "rate", "strike_deg",
                                                     "dip_deg", "rake_deg", "ztor_km", "zbot_km", "width_km",
                                                     "length_km", "zhyp_km", "corners")},
                      "piece_rupture": rs.piece_rupture[:1], "piece_corners": rs.piece_corners[:1]})


# --------------------------------------------------------------------------- #
# distances: brute force on a mesh of the surface
# --------------------------------------------------------------------------- #
def test_rrup_and_rjb_match_a_brute_force_mesh_of_the_bent_surface():
    tr = Trace()
    rs = bent(single_magnitude(6.6, 0.01))
    length, width = float(rs.length_km[0]), float(rs.width_km[0])
    along, down = tr.offsets(length, width)
    assert along.size == len(rs) and rs.piece_rupture.size > 0
    sites = sites_km(tr, np.random.default_rng(11))
    lon, lat = aeqd_inverse(sites[:, 0], sites[:, 1], *tr.ref)
    got = rupture_distances(lon, lat, rs, ref_lon=tr.ref[0], ref_lat=tr.ref[1])
    n_sites = len(sites)
    for r, (a, d) in enumerate(zip(along, down)):
        best_rrup = np.full(n_sites, np.inf)
        best_rjb = np.full(n_sites, np.inf)
        for i, lo, hi in tr.parts(a, length):
            p0 = tr.point(i, lo, d)
            e1 = tr.point(i, hi, d) - p0
            e2 = tr.point(i, lo, d + width) - p0

            def rrup(s, t, p0=p0, e1=e1, e2=e2):
                x = p0[0] + s * e1[0] + t * e2[0] - sites[:, 0, None, None]
                y = p0[1] + s * e1[1] + t * e2[1] - sites[:, 1, None, None]
                z = p0[2] + s * e1[2] + t * e2[2]
                return np.sqrt(x * x + y * y + z * z)

            def rjb(s, t, p0=p0, e1=e1, e2=e2):
                x = p0[0] + s * e1[0] + t * e2[0] - sites[:, 0, None, None]
                y = p0[1] + s * e1[1] + t * e2[1] - sites[:, 1, None, None]
                return np.sqrt(x * x + y * y)

            best_rrup = np.minimum(best_rrup, zoom_min(rrup, n_sites))
            best_rjb = np.minimum(best_rjb, zoom_min(rjb, n_sites))
        assert_allclose(got["rrup_km"][:, r], best_rrup, atol=1e-3)  # 1 m
        assert_allclose(got["rjb_km"][:, r], best_rjb, atol=1e-3)


def _quadrature_gc(site, edges):
    """Spudich & Chiou (2015) T and U of a site about a trace of segments (start, end), their weights
    integrated numerically: w_i = integral over the segment of 1 / r^2."""
    w_sum = t_sum = u_sum = offset = 0.0
    for p0, p1 in edges:
        ell = float(np.hypot(*(p1 - p0)))
        s_hat = (p1 - p0) / ell
        rel = site - p0
        t = rel[0] * s_hat[1] - rel[1] * s_hat[0]  # to the right of the segment
        u = rel @ s_hat
        w = quad(lambda s: 1.0 / ((s - u) ** 2 + t * t), 0.0, ell, epsabs=0.0, epsrel=1e-12, limit=200)[0]
        w_sum, t_sum, u_sum = w_sum + w, t_sum + w * t, u_sum + w * (u + offset)
        offset += ell
    return t_sum / w_sum, u_sum / w_sum, offset


def test_rx_and_ry0_are_the_generalized_coordinates_of_the_top_edges():
    tr = Trace()
    rs = bent(single_magnitude(6.6, 0.01))
    length, width = float(rs.length_km[0]), float(rs.width_km[0])
    along, down = tr.offsets(length, width)
    sites = sites_km(tr, np.random.default_rng(5))
    lon, lat = aeqd_inverse(sites[:, 0], sites[:, 1], *tr.ref)
    got = rupture_distances(lon, lat, rs, ref_lon=tr.ref[0], ref_lat=tr.ref[1])
    for r in np.nonzero(rs.n_pieces > 0)[0][::3]:
        edges = [(tr.point(i, lo, down[r])[:2], tr.point(i, hi, down[r])[:2]) for i, lo, hi in tr.parts(along[r], length)]
        for k, site in enumerate(sites):
            t, u, total = _quadrature_gc(site, edges)
            assert got["rx_km"][k, r] == pytest.approx(t, abs=1e-6)
            assert got["ry0_km"][k, r] == pytest.approx(max(-u, u - total, 0.0), abs=1e-6)


def test_generalized_coordinates_closed_form_against_quadrature():
    rng = np.random.default_rng(3)
    ell = np.array([10.0, 4.0, 7.5])
    t = rng.uniform(-20, 20, (50, 3))
    u = rng.uniform(-15, 25, (50, 3))
    t[:5] = 0.0  # on the segments' lines (outside them)
    u[:5] = np.where(rng.random((5, 3)) < 0.5, -rng.uniform(0.5, 5, (5, 3)), ell + rng.uniform(0.5, 5, (5, 3)))
    offset = np.r_[0.0, np.cumsum(ell)[:-1]]
    big_t, big_u = generalized_coordinates(t, u, ell, offset, np.array([0]))
    for k in range(50):
        w = np.array([quad(lambda s: 1.0 / ((s - u[k, i]) ** 2 + t[k, i] ** 2), 0, ell[i], epsrel=1e-12, limit=200)[0]
                      for i in range(3)])
        assert big_t[k, 0] == pytest.approx((w * t[k]).sum() / w.sum(), rel=1e-9, abs=1e-9)
        assert big_u[k, 0] == pytest.approx((w * (u[k] + offset)).sum() / w.sum(), rel=1e-9, abs=1e-9)
    # one segment: T = t and U = u; a site on a segment: T = 0, U its position along the trace
    one_t, one_u = generalized_coordinates(t[:, :1], u[:, :1], ell[:1], offset[:1], np.array([0]))
    assert_allclose(one_t[:, 0], t[:, 0], rtol=1e-12, atol=1e-12)
    assert_allclose(one_u[:, 0], u[:, 0], rtol=1e-12, atol=1e-12)
    on_t, on_u = generalized_coordinates(np.array([[3.0, 0.0, -2.0]]), np.array([[12.0, 1.5, -4.0]]), ell, offset,
                                         np.array([0]))
    assert on_t[0, 0] == 0.0 and on_u[0, 0] == pytest.approx(ell[0] + 1.5)


def test_rx_positive_on_the_hanging_wall_and_ry0_zero_within_the_rupture():
    # Ancheta et al. (2014): Rx > 0 over the hanging wall (the side the fault dips to), < 0 over
    # the footwall; Ry0 = 0 between the rupture's ends, > 0 beyond them.
    tr = Trace()
    rs = bent(single_magnitude(7.3, 0.01))  # longer than the fault: one rupture over the whole trace
    assert len(rs) == 1 and rs.n_pieces[0] == 3
    mids = np.array([tr.p[i] + 0.5 * tr.ell[i] * tr.s[i] for i in range(3)])
    hanging = mids + 8.0 * tr.n
    foot = mids - 8.0 * tr.n
    before = tr.p[0] - 12.0 * tr.s[0]
    beyond = tr.p[3] + np.outer([5.0, 15.0, 40.0], tr.s[2])
    pts = np.vstack([hanging, foot, mids, before, beyond])
    lon, lat = aeqd_inverse(pts[:, 0], pts[:, 1], *tr.ref)
    d = {k: v[:, 0] for k, v in rupture_distances(lon, lat, rs, ref_lon=tr.ref[0], ref_lat=tr.ref[1]).items()}
    assert np.all(d["rx_km"][:3] > 0) and np.all(d["rx_km"][3:6] < 0)
    # the trace lies 1 km up dip of the top edge (upper depth 1 km, dip 45): the footwall side
    assert np.all(d["rx_km"][6:9] < 0)
    assert_allclose(d["rx_km"][6:9], -1.0, atol=0.2)  # -1 exactly for a straight trace
    assert_allclose(d["ry0_km"][:9], 0.0, atol=0)
    assert d["ry0_km"][9] > 0 and np.all(np.diff(d["ry0_km"][10:]) > 0) and d["ry0_km"][10] > 0
    # 40 km past the end along the last segment: U is a weighted mean of positions along the
    # trace, each at most L + 40 (triangle inequality), and the bent trace pulls it back
    assert 30.0 < d["ry0_km"][12] <= 40.0


def test_a_straight_trace_of_three_points_is_the_planar_fault():
    # a meridian is straight in both projections: the bent construction must give the planar one
    straight3 = [(12.0, 45.0), (12.0, 45.12), (12.0, 45.3)]
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.2, bin_width=0.2, rate_above_mmin=0.05)
    b = bent(mfd, trace=straight3)
    p = planar_fault_ruptures("bent", [straight3[0], straight3[-1]], dip_deg=DIP, upper_depth_km=USD,
                              lower_depth_km=LSD, rake_deg=RAKE, mfd=mfd, rupture_step_km=STEP)
    assert len(b) == len(p) and b.piece_rupture.size > 0
    assert_allclose(b.corners, p.corners, atol=1e-9)
    rng = np.random.default_rng(2)
    lon, lat = 12.0 + rng.uniform(-0.6, 0.6, 30), 45.15 + rng.uniform(-0.4, 0.4, 30)
    db, dp = rupture_distances(lon, lat, b), rupture_distances(lon, lat, p)
    for key in db:  # the two are built in projections about different centres: equal within 1 cm
        assert_allclose(db[key], dp[key], rtol=0, atol=1e-5)
    y = np.geomspace(0.01, 2.0, 10)
    args = (lon[:8], lat[:8], np.full(8, 400.0))
    hb = compute_site_hazard(*args, b, [get_gmm("BSSA14")], ["PGA", "SA_1.0"], y, ref=(12.0, 45.15))
    hp = compute_site_hazard(*args, p, [get_gmm("BSSA14")], ["PGA", "SA_1.0"], y, ref=(12.0, 45.15))
    assert_allclose(hb, hp, rtol=1e-6)


def test_pairs_and_the_distance_cut_off_on_bent_ruptures():
    tr = Trace()
    rs = RuptureSet.concat([bent(single_magnitude(6.6, 0.01)),
                            planar_fault_ruptures("p", [(12.1, 45.3), (12.3, 45.35)], dip_deg=60, upper_depth_km=0,
                                                  lower_depth_km=12, rake_deg=0, mfd=single_magnitude(6.0, 0.01))])
    sites = sites_km(tr, np.random.default_rng(8))
    lon, lat = aeqd_inverse(sites[:, 0], sites[:, 1], *tr.ref)
    dense = rupture_distances(lon, lat, rs)
    si, ri = np.nonzero(np.ones(dense["rjb_km"].shape, dtype=bool))
    pairs = pair_distances(lon, lat, rs, si, ri)
    for key in dense:
        assert_allclose(pairs[key], dense[key][si, ri], rtol=0, atol=1e-12)
    for metric, key in (("rjb", "rjb_km"), ("rrup", "rrup_km")):
        cheap = site_rupture_mask(lon, lat, rs, 12.0, metric=metric)
        exact = site_rupture_mask(lon, lat, rs, 12.0, metric=metric, exact=True)
        assert np.array_equal(exact, dense[key] <= 12.0)
        assert np.all(cheap >= exact)  # the bounding circles lose no pair


# --------------------------------------------------------------------------- #
# ruptures larger than the fault
# --------------------------------------------------------------------------- #
def test_rupture_fit_names_exactly_the_capped_magnitudes():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=7.6, bin_width=0.2, rate_above_mmin=0.05)
    frame = fault_frame("bent", TRACE, DIP, USD, LSD)
    fit = rupture_fit(frame, mfd.mag, RAKE)
    rs = bent(mfd)
    for m, capped, above in zip(fit.mag, fit.capped, fit.area_above_fault):
        built = rs.length_km[np.isclose(rs.mag, m)][0]
        assert (built == pytest.approx(frame.length_km, rel=1e-12)) == capped or not capped
        assert capped or built < frame.length_km
        assert not above or capped  # area above the fault's implies a capped length
    assert fit.capped[-1] and not fit.capped[0]
    # Wells & Coppersmith (1994) Table 2A, reverse: log10 RA = -3.99 + 0.98 M, independent of the module
    assert_allclose(fit.area_km2, 10 ** (-3.99 + 0.98 * fit.mag), rtol=1e-12)
    assert np.array_equal(fit.area_above_fault, 10 ** (-3.99 + 0.98 * fit.mag) > frame.length_km * frame.width_km)


def test_a_fault_smaller_than_its_ruptures_warns_once_and_the_balance_lists_them(tmp_path):
    text = (MINI / "sources.toml").read_text().replace(
        'mfd = { kind = "truncated_gr", b_value = 1.0, min_mag = 5.0, max_mag = 6.8, bin_width = 0.2, '
        'rate_above_min = 0.02 }',
        'mfd = { kind = "truncated_gr", b_value = 1.0, min_mag = 5.0, max_mag = 7.4, bin_width = 0.2, '
        'slip_rate_mm_per_yr = 1.0 }')
    path = tmp_path / "sources.toml"
    path.write_text(text)
    model = load_source_model(path)
    [w] = model.warnings
    assert (w.row, w.column) == (12, "faults[0].mfd")
    assert "fault 'test_fault': the ruptures of M 6.9, 7.1 and 7.3 do not fit on the fault (29.3 km along" in w.message
    assert "capped at the fault length and keeps its rate" in w.message
    row = model.sources[0]
    assert row["mags_capped"] == [6.9, 7.1, 7.3] and row["mags_area_above_fault"] == [6.9, 7.1, 7.3]
    assert row["moment_rate_nm_per_yr"] > 0 and row["fault_area_km2"] == pytest.approx(
        row["fault_length_km"] * row["fault_width_km"], rel=1e-3)


def test_bent_trace_errors_are_located(tmp_path):
    base = (MINI / "sources.toml").read_text()
    cases = [("[[9.86, 19.95], [9.86, 19.95], [9.86, 19.95]]", "faults[0].trace", "trace points coincide"),
             ("[[9.86, 19.95], [10.14, 19.97], [10.0, 19.90], [10.0, 20.1]]", "faults[0].trace", "crosses itself")]
    for trace, column, message in cases:
        path = tmp_path / "sources.toml"
        path.write_text(base.replace("[[9.86, 19.95], [10.14, 19.97]]", trace))
        with pytest.raises(InputError, match=message) as exc:
            load_source_model(path)
        assert (exc.value.row, exc.value.column) == (7, column)
