"""Fragility library loading, validation and crossing detection."""
import numpy as np
import pytest

from quakefolio.core.errors import InputError
from quakefolio.fragility import CrossingError, DamageStateSet, load_library, parse_library

from conftest import MINI


def _set(**kw):
    base = dict(class_code="X", im="SA_0.3", names=("a", "b"), medians=[0.2, 0.6], betas=[0.5, 0.5],
                mean_damage_ratio=[0.1, 1.0], cov=[0.5, 0.0], downtime_days=[np.nan, np.nan],
                casualty_rate=[np.nan, np.nan])
    base.update(kw)
    return DamageStateSet(**base)


def test_mini_library_loads():
    lib = load_library(MINI / "fragility.toml")
    assert sorted(lib.classes) == ["TST-A", "TST-B", "TST-C"]
    a = lib["TST-A"]
    assert a.names == ("light", "heavy", "collapse") and a.collapse_index == 2 and a.im == "SA_0.3"
    assert len(lib.sha256) == 64


def test_unknown_class_lists_valid_ones():
    lib = load_library(MINI / "fragility.toml")
    with pytest.raises(KeyError, match="TST-A"):
        lib["NOPE"]


@pytest.mark.parametrize("kw, match", [
    (dict(medians=[0.6, 0.2]), "increase with severity"),
    (dict(betas=[0.5, -0.1]), "beta must be a positive"),
    (dict(mean_damage_ratio=[0.5, 0.2]), "non-decreasing"),
    (dict(im="PGV"), "unknown IM"),
])
def test_damage_state_set_validation(kw, match):
    with pytest.raises(ValueError, match=match):
        _set(**kw)


def test_crossing_detected_inside_range_with_its_im():
    # Curves cross where (ln x - ln m1)/b1 = (ln x - ln m2)/b2:
    # m = (0.2, 0.25), b = (0.3, 0.9) -> ln x* = (0.9 ln 0.2 - 0.3 ln 0.25)/0.6.
    dss = _set(medians=[0.2, 0.25], betas=[0.3, 0.9])
    x_star = np.exp((0.9 * np.log(0.2) - 0.3 * np.log(0.25)) / 0.6)
    with pytest.raises(CrossingError, match=f"{x_star:.4g}"):
        dss.check_crossing(0.001, 4.0)
    dss.check_crossing(x_star * 1.01, 4.0)  # outside the hazard's range: accepted
    assert dss.crossings(0.001, x_star * 0.99) == []


def test_probabilities_are_ordered_and_bounded():
    dss = _set(medians=[0.2, 0.6], betas=[0.5, 0.5])
    p = dss.probabilities(np.geomspace(1e-3, 10, 50))
    assert np.all((p >= 0) & (p <= 1)) and np.all(p[:, 0] >= p[:, 1])


def test_library_errors_name_line_and_key():
    text = (MINI / "fragility.toml").read_text().replace("beta = 0.5\nmean_damage_ratio = 0.1",
                                                          "beta = -0.5\nmean_damage_ratio = 0.1")
    import tomllib

    with pytest.raises(InputError, match=r"lib.toml:\d+: column 'classes.TST-B.states\[0\].beta'"):
        parse_library(tomllib.loads(text), text=text, path="lib.toml")
