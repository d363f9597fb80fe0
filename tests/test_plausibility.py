"""Plausibility checks of inputs: bounds and likely units, zero and non-overlapping hazard curves,
self-crossing fault traces, fragility medians, and the located warnings of the read-inputs stage.

The corpus cases of ``tests/data/broken/`` exercise the same checks through ``check`` and
``run``; these tests pin the functions themselves.
"""
import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from quakefolio.core.curves import NoCommonRates, interpolate_period
from quakefolio.core.errors import InputError
from quakefolio.core.gmm import get_gmm
from quakefolio.core.plausibility import (
    likely_acceleration_unit, median_problem, unit_advice, vs30_problem,
)
from quakefolio.core.risk import damage_state_rates
from quakefolio.core.sources.geometry import polyline_self_crossing
from quakefolio.fragility import parse_library
from quakefolio.pipeline.io.source_model import load_source_model
from quakefolio.pipeline.stages.plausibility import model_range

from conftest import MINI

G = 9.80665
LEVELS = np.array([0.01, 0.1, 0.5, 2.0])
RATES = np.array([0.2, 0.02, 0.002, 0.0002])


# ---- bounds and likely units -------------------------------------------------------------------

@pytest.mark.parametrize("value, declared, unit", [
    (2.0 * 100 * G, "g", "cm/s2"),      # a 2 g level written in cm/s2
    (4.0 * G, "g", "m/s2"),             # 4 g in m/s2
    (2.0 * 1000 * G, "g", "mm/s2"),     # 2 g in mm/s2
    (2.0, "cm/s2", "g"),                # 2 g read as cm/s2
])
def test_likely_unit_is_the_coarsest_that_makes_the_value_plausible(value, declared, unit):
    name, in_g = likely_acceleration_unit(value, declared, 0.05, 10.0)
    assert name == unit
    assert 0.05 <= in_g <= 10.0


def test_no_unit_fits_a_value_plausible_in_none():
    assert likely_acceleration_unit(0.04, "g", 0.05, 10.0) is None
    assert unit_advice(0.04, "g", 0.05, 10.0, {}) == ""


def test_median_bounds_and_unit():
    assert median_problem(0.2) is None and median_problem(10.0) is None and median_problem(1e-3) is None
    assert "looks like cm/s2 (0.2 g)" in median_problem(0.2 * 100 * G)
    assert "looks like m/s2 (1.5 g)" in median_problem(1.5 * G)
    assert "below the threshold of felt shaking" in median_problem(5e-4)


def test_vs30_bounds_and_units():
    assert vs30_problem(50.0) is None and vs30_problem(3000.0) is None and vs30_problem(760.0) is None
    assert "looks like km/s (760 m/s)" in vs30_problem(0.76)
    assert "looks like ft/s (1524 m/s)" in vs30_problem(5000.0)
    assert vs30_problem(5.0).endswith("(50-3000 m/s)")


def test_model_ranges_come_from_the_models_applicability():
    gmms = [("BSSA14", 0.5, get_gmm("BSSA14")), ("CB14", 0.5, get_gmm("CB14"))]
    (lo, hi), words = model_range(gmms, "vs30_mps")
    assert (lo, hi) == (150.0, 1500.0) and words == "BSSA14 150-1500, CB14 150-1500"
    (lo, hi), _ = model_range(gmms, "mag")  # the widest over mechanisms and models
    assert (lo, hi) == (3.0, 8.5)


# ---- zero and non-overlapping curves in period interpolation ----------------------------------

def test_zero_curves_interpolate_to_zero_hazard():
    levels, rates = interpolate_period(0.6, 0.3, LEVELS, np.zeros(4), 1.0, 2 * LEVELS, np.zeros(4))
    assert_array_equal(rates, 0.0)
    # end levels log-log between the neighbours' end levels: w = ln(2)/ln(1/0.3)
    w = np.log(0.6 / 0.3) / np.log(1.0 / 0.3)
    assert_allclose(levels[[0, -1]], [0.01 * 2 ** w, 2.0 * 2 ** w], rtol=1e-12)
    assert np.all(np.diff(levels) > 0)
    assert_array_equal(damage_state_rates(levels, rates, [0.2, 0.6], [0.6, 0.6]), 0.0)


def test_a_quiet_site_leaves_the_other_sites_unchanged():
    x1, l1 = np.stack([LEVELS, LEVELS]), np.stack([RATES, np.zeros(4)])
    x2, l2 = np.stack([LEVELS, LEVELS]), np.stack([RATES / 2, np.zeros(4)])
    levels, rates = interpolate_period(0.6, 0.3, x1, l1, 1.0, x2, l2)
    alone = interpolate_period(0.6, 0.3, LEVELS, RATES, 1.0, LEVELS, RATES / 2)
    assert_array_equal(levels[0], alone[0])
    assert_array_equal(rates[0], alone[1])
    assert_array_equal(rates[1], 0.0)


@pytest.mark.parametrize("second, blame", [(np.zeros(4), 2), (RATES * 1e-7, 2)])
def test_curves_without_common_rates_name_the_site(second, blame):
    x, l1, l2 = np.stack([LEVELS] * 3), np.stack([RATES] * 3), np.stack([RATES, second, RATES])
    with pytest.raises(NoCommonRates) as exc:
        interpolate_period(0.6, 0.3, x, l1, 1.0, x, l2)
    assert exc.value.index == (1,) and exc.value.neighbour == blame


def test_a_zero_first_neighbour_is_the_one_blamed():
    with pytest.raises(NoCommonRates, match=r"0 at every level and 0\.0002 to 0\.2 /yr") as exc:
        interpolate_period(0.6, 0.3, LEVELS, np.zeros(4), 1.0, LEVELS, RATES)
    assert exc.value.index == () and exc.value.neighbour == 1


# ---- fault traces ------------------------------------------------------------------------------

@pytest.mark.parametrize("lon, lat, expected", [
    ([9.9, 10.1], [19.95, 19.97], None),
    ([9.9, 10.0, 10.1], [19.95, 19.965, 19.97], None),
    ([9.9, 10.1, 10.1], [19.95, 19.97, 19.97], None),               # a repeated point is no crossing
    ([9.9, 10.1, 10.0, 10.0], [19.95, 19.97, 19.90, 20.0], (0, 2)),  # third segment crosses the first
    ([9.9, 10.1, 10.0, 9.9], [19.95, 19.97, 20.05, 19.95], (0, 2)),  # closed: the last point is the first
    ([9.9, 10.1, 10.0], [19.95, 19.95, 19.95], (0, 1)),             # straight back along a parallel
])
def test_polyline_self_crossing(lon, lat, expected):
    assert polyline_self_crossing(lon, lat) == expected


def test_source_model_keeps_magnitude_ranges_and_a_bent_trace_is_accepted(tmp_path):
    text = (MINI / "sources.toml").read_text().replace(
        "trace = [[9.86, 19.95], [10.14, 19.97]]", "trace = [[9.86, 19.95], [10.00, 19.965], [10.14, 19.97]]")
    path = tmp_path / "sources.toml"
    path.write_text(text)
    model = load_source_model(path)
    (row_f, col_f, lo_f, hi_f, reg_f), (row_p, col_p, lo_p, hi_p, reg_p) = model.magnitudes
    assert reg_f == reg_p == "active_crustal"
    assert (col_f, col_p) == ("faults[0].mfd", "points[0].mfd")
    assert_allclose([lo_f, hi_f, lo_p, hi_p], [5.1, 6.7, 4.55, 6.45])
    assert text.splitlines()[row_f - 1].startswith("mfd =")
    assert model.warnings == ()  # a three-point trace is a bent fault, no longer straightened
    assert model.ruptures.piece_rupture.size > 0


# ---- fragility library -------------------------------------------------------------------------

def _library(median, collapse_state=None):
    states = [{"name": "light", "median": median, "beta": 0.5, "mean_damage_ratio": 0.1},
              {"name": "collapse", "median": max(2 * median, 1.0), "beta": 0.5, "mean_damage_ratio": 1.0}]
    body = {"im": "PGA", "states": states}
    if collapse_state:
        body["collapse_state"] = collapse_state
    return {"format": "quakefolio-fragility-1", "classes": {"X": body}}


def test_median_in_cm_s2_is_an_error_at_its_key():
    with pytest.raises(InputError, match=r"median 196\.133 g .*looks like cm/s2 \(0\.2 g\)") as exc:
        parse_library(_library(196.133))
    assert exc.value.column == "classes.X.states[0].median"


def test_collapse_state_at_the_least_severe_state_warns():
    assert parse_library(_library(0.2)).warnings == ()
    [w] = parse_library(_library(0.2, collapse_state="light")).warnings
    assert w.column == "classes.X.collapse_state" and "least severe of 2" in w.message
