"""One definition per convention in the core: IM names, rake classes, random streams."""
from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from quakefolio.core import ims
from quakefolio.core.events.gmf import BJ08_PGA_PERIOD_S, cross_im_correlation_matrix
from quakefolio.core.gmm import im_period_s, mechanism_flags
from quakefolio.core.sources.ruptures import slip_type_from_rake

# --- IM names: quakefolio.core.ims is the one parser ------------------------------------------

ACCEPTED = {"PGA": "PGA", " PGA ": "PGA", "SA_1": "SA_1.0", "SA_1.0": "SA_1.0", "SA_0.30": "SA_0.3",
            "SA_0.2": "SA_0.2", "SA_20": "SA_20.0", "SA_0.01": "SA_0.01"}
REJECTED = ["PGV", "SA_.5", "SA_1.", "SA(1.0)", "sa_1.0", "SA_0", "SA_25", "SA_-1", "", 1.0, None]


@pytest.mark.parametrize("name, canon", sorted(ACCEPTED.items()))
def test_accepted_names_agree_everywhere(name, canon):
    assert ims.parse_im(name) == canon
    if canon == "PGA":
        assert ims.im_period(name) == ims.PGA_PERIOD_S == 0.01
        assert ims.model_period(name) == im_period_s(name) == ims.PGA_MODEL_PERIOD_S == 0.0
    else:
        assert ims.im_period(name) == im_period_s(name) == float(canon[3:])


@pytest.mark.parametrize("name", REJECTED, ids=repr)
def test_rejected_names_are_rejected_by_every_reader(name):
    for reader in (ims.parse_im, ims.im_period, ims.model_period, im_period_s):
        with pytest.raises(ValueError):
            reader(name)


def test_pga_period_conventions():
    # cross-IM correlation (Baker & Jayaram 2008) takes PGA as SA at 0.01 s: identical rows
    assert BJ08_PGA_PERIOD_S == ims.PGA_PERIOD_S
    c = cross_im_correlation_matrix(["PGA", "SA_0.01", "SA_1.0"])
    assert_array_equal(c[0], c[1])


# --- rake classes: one definition (quakefolio.core.gmm.mechanism_flags) -----------------------

def _old_slip_type(rake):
    """The slip-type classification as it was written before (reference for equality)."""
    out = np.full(rake.shape, "strike_slip", dtype="<U11")
    out[(rake > 30.0) & (rake < 150.0)] = "reverse"
    out[(rake > -150.0) & (rake < -30.0)] = "normal"
    return out


def test_slip_type_follows_the_mechanism_flags():
    rake = np.concatenate([np.linspace(-180, 180, 3601), [-150, -30, 30, 150, -150.0001, 29.9999],
                           np.random.default_rng(1).uniform(-180, 180, 1000)])
    kinds = slip_type_from_rake(rake)
    assert_array_equal(kinds, _old_slip_type(rake))
    unspecified, ss, nm, rv = mechanism_flags(rake)
    assert_array_equal(kinds == "reverse", rv == 1.0)
    assert_array_equal(kinds == "normal", nm == 1.0)
    assert_array_equal(kinds == "strike_slip", ss == 1.0)
    assert not unspecified.any()
    assert slip_type_from_rake(np.nan)[()] == "strike_slip"  # unspecified: strike-slip, as before
