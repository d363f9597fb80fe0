"""Strike distributions of point and area sources: weights split the rates, uniform strikes over the
compass, exact rupture counts, Rx set by the orientation, and located errors for the new keys."""
import numpy as np
import pytest
from numpy.testing import assert_allclose

from quakefolio.core.errors import InputError
from quakefolio.core.sources.counts import point_rupture_count
from quakefolio.core.sources.geometry import rupture_distances
from quakefolio.core.sources.mfd import single_magnitude, truncated_gr
from quakefolio.core.sources.ruptures import point_source_ruptures
from quakefolio.core.sources.strikes import mechanisms_with_strikes, strike_distribution, uniform_strikes
from quakefolio.pipeline.io.source_model import count_source_model, load_source_model

POINT = """format = "quakefolio-sources-1"

[[points]]
id = "p"
lon = 10.05
lat = 20.10
upper_depth_km = 0.0
lower_depth_km = 15.0
hypo_depths = [[6.0, 0.5], [10.0, 0.5]]
{keys}
mfd = {{ kind = "truncated_gr", b_value = 1.0, min_mag = 4.5, max_mag = 6.5, bin_width = 0.1, rate_above_min = 0.05 }}
"""


def test_uniform_strikes_cover_the_compass_with_equal_weights():
    table = uniform_strikes(12)
    assert_allclose(table[:, 0], np.arange(0, 360, 30))
    assert_allclose(table[:, 1], 1 / 12, rtol=1e-15)
    assert_allclose(uniform_strikes(1), [[0.0, 1.0]])
    for bad in (0, 361, 2.5, True, "4"):
        with pytest.raises(ValueError, match="whole number from 1 to 360"):
            uniform_strikes(bad)


def test_strike_distribution_is_checked_and_normalised():
    table = strike_distribution([(10.0, 0.3), (100.0, 0.7 + 5e-7)])
    assert table[:, 1].sum() == pytest.approx(1.0, abs=1e-15)
    for strikes, message in [([(360.0, 1.0)], r"strike 360 \(entry 1\) must lie in \[0, 360\)"),
                             ([(10.0, 0.5), (20.0, 0.0)], r"weight 0 \(entry 2\) must be > 0"),
                             ([(10.0, 0.5), (20.0, 0.4)], "must sum to 1; they sum to 0.9"),
                             ([(10.0, 0.5), (10.0, 0.5)], "strike 10 is listed twice"),
                             ([], "non-empty")]:
        with pytest.raises(ValueError, match=message):
            strike_distribution(strikes)


def test_rates_split_by_mechanism_and_strike_weights():
    mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=6.0, bin_width=0.5, rate_above_mmin=0.02)
    mechs = mechanisms_with_strikes([(45.0, 90.0, 0.6), (90.0, 0.0, 0.4)], strike_distribution([(30.0, 0.25),
                                                                                               (120.0, 0.75)]))
    assert [m[:3] for m in mechs] == [(30.0, 45.0, 90.0), (120.0, 45.0, 90.0), (30.0, 90.0, 0.0), (120.0, 90.0, 0.0)]
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=mfd, hypo_depths=[(8.0, 1.0)], mechanisms=mechs,
                               upper_depth_km=0.0, lower_depth_km=15.0)
    assert len(rs) == point_rupture_count(len(mfd.mag), 1, 2, n_strikes=2)
    for strike, w_s in ((30.0, 0.25), (120.0, 0.75)):
        for dip, w_m in ((45.0, 0.6), (90.0, 0.4)):
            sel = (rs.strike_deg == strike) & (rs.dip_deg == dip)
            assert_allclose(rs.rate[sel], mfd.rate * w_m * w_s, rtol=1e-12)
    assert_allclose(rs.total_rate, 0.02, rtol=1e-12)


def test_rx_of_a_point_source_depends_on_its_strike():
    # a dipping plane under the site's east: strike 0 dips east (site on the hanging wall, Rx > 0),
    # strike 180 dips west (footwall, Rx < 0); Rx is the NGA-West2 signed distance (Ancheta et al. 2014)
    rs = point_source_ruptures("p", 10.0, 20.0, mfd=single_magnitude(6.5, 0.01), hypo_depths=[(8.0, 1.0)],
                               mechanisms=mechanisms_with_strikes([(45.0, 90.0, 1.0)], uniform_strikes(4)),
                               upper_depth_km=0.0, lower_depth_km=15.0)
    assert_allclose(rs.strike_deg, [0, 90, 180, 270])
    rx = rupture_distances([10.1], [20.0], rs)["rx_km"][0]
    assert rx[0] > 0 > rx[2]
    assert rx[0] - rx[2] > 10.0  # the same plane turned round: the site changes side


def test_source_model_keys_build_and_count_exactly(tmp_path):
    path = tmp_path / "s.toml"
    for keys, n_conf in [("mechanisms = [[45.0, 90.0, 0.6], [90.0, 0.0, 0.4]]\nuniform_strikes = 6", 12),
                         ("mechanisms = [[45.0, 90.0, 1.0]]\nstrikes = [[10.0, 0.25], [100.0, 0.75]]", 2),
                         ("mechanisms = [[0.0, 90.0, 0.0, 1.0]]", 1)]:
        path.write_text(POINT.format(keys=keys))
        model = load_source_model(path)
        assert len(model.ruptures) == 20 * 2 * n_conf == count_source_model(path)
        assert model.ruptures.total_rate == pytest.approx(0.05, rel=1e-12)


@pytest.mark.parametrize("keys, column, message", [
    ("mechanisms = [[45.0, 90.0, 1.0]]\nstrikes = [[0.0, 1.0]]\nuniform_strikes = 4", "points[0].uniform_strikes",
     "give either 'strikes' or 'uniform_strikes', not both"),
    ("mechanisms = [[0.0, 45.0, 90.0, 1.0]]\nuniform_strikes = 4", "points[0].mechanisms",
     r"with 'uniform_strikes' each mechanism is \[dip_deg, rake_deg, weight\]"),
    ("mechanisms = [[45.0, 90.0, 1.0]]", "points[0].mechanisms",
     r"\[strike_deg, dip_deg, rake_deg, weight\]; or \[dip_deg, rake_deg, weight\] with 'strikes'"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nstrikes = [[0.0, 0.5], [90.0, 0.4]]", "points[0].strikes",
     "the weights of strikes must sum to 1; they sum to 0.9"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nstrikes = [[400.0, 1.0]]", "points[0].strikes",
     r"strike 400 \(entry 1\) must lie in \[0, 360\)"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nstrikes = [0.0, 1.0]", "points[0].strikes",
     r"expected a list of \[number, number\] entries"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nuniform_strikes = 0", "points[0].uniform_strikes",
     "whole number from 1 to 360; got 0"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nuniform_strikes = 7.5", "points[0].uniform_strikes",
     "whole number from 1 to 360; got 7.5"),
    ("mechanisms = [[45.0, 90.0, 1.0]]\nuniform_strike = 4", "points[0].uniform_strike",
     "did you mean 'uniform_strikes'"),
])
def test_strike_keys_are_refused_with_a_located_line(tmp_path, keys, column, message):
    path = tmp_path / "s.toml"
    text = POINT.format(keys=keys)
    path.write_text(text)
    with pytest.raises(InputError, match=message) as exc:
        load_source_model(path)
    key = column.split(".")[-1]
    row = next(i for i, line in enumerate(text.splitlines(), 1) if line.startswith(f"{key} ="))
    assert (exc.value.row, exc.value.column) == (row, column)
