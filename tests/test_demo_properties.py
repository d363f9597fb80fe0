"""Invariants over every building class of the demo library (on the demo hazard)."""
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

from quakefolio.core.curves import prob_in_years
from quakefolio.core.loss import expected_annual_loss, loss_exceedance_rates
from quakefolio.pipeline import stages
from quakefolio.pipeline.io.ingest import curves_for_im

from conftest import DEMO

INPUTS = stages.load_inputs(DEMO / "quakefolio_tabulated.toml")
CLASSES = sorted(INPUTS.library.classes)


@pytest.mark.parametrize("code", CLASSES)
def test_damage_rates_ordered_and_probabilities_bounded(code):
    dss = INPUTS.library[code]
    levels, rates = curves_for_im(INPUTS.hazard, dss.im)
    ds = dss.annual_rates(levels, rates)
    assert ds.shape == (len(INPUTS.hazard.site_id), dss.n_states)
    assert np.all(ds > 0) and np.all(np.diff(ds, axis=-1) <= 0)
    p = prob_in_years(ds, 50)
    assert np.all((p >= 0) & (p <= 1))
    frag = dss.probabilities(np.geomspace(1e-4, 10, 200))
    assert np.all((frag >= 0) & (frag <= 1)) and np.all(np.diff(frag, axis=-1) <= 0)


@pytest.mark.parametrize("code", CLASSES)
def test_eal_equals_integral_of_loss_curve(code):
    # E[annual loss ratio] = integral over l in [0, 1] of nu(LR > l) (layer-cake formula).
    dss = INPUTS.library[code]
    levels, rates = curves_for_im(INPUTS.hazard, dss.im)
    ds = dss.annual_rates(levels, rates)
    grid = np.linspace(0, 1, 4001)
    curve = loss_exceedance_rates(ds, dss.mean_damage_ratio, grid, dss.cov)
    assert np.all(np.diff(curve, axis=-1) <= 1e-18)
    assert_allclose(integrate.trapezoid(curve, grid, axis=-1), expected_annual_loss(ds, dss.mean_damage_ratio),
                    rtol=2e-3)
