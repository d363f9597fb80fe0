"""Subduction (AG16) and stable-continental (PZT11) models checked against pygmm's scalar models.

Oracle: pygmm 0.8.0 scalar implementations ``AbrahamsonGregorAddo2016`` and
``PezeshkZandiehTavakoli2011``, one model object per scenario, on 300 seeded
scenarios each. Both sides read the same coefficient tables (pygmm's data
files), so agreement is to round-off; the tolerance is 1e-6 in ln units.
Periods between tabulated ones: pygmm's values per table row are interpolated
linearly in ln(period) (what its ``interp_ln_spec_accels`` / ``interp_ln_stds``
do), the rule of ``quakefolio.core.gmm``.

Where pygmm departs from the papers, and how the comparison stays like-for-like:

* PZT11 standard deviation: Pezeshk, Zandieh & Tavakoli (2011) give the
  standard deviation of log10 Y (the model is a regression in log10 units);
  pygmm returns that log10 value where it promises a natural-log one (its
  ``_ln_std``; the same holds for its Atkinson & Boore 2006 model, 0.30).
  quakefolio returns ln(10) times it (0.58 at M 6 for PGA instead of 0.25), so
  the oracle's sigma is multiplied by ln(10) below. The median needs no
  conversion (pygmm converts 10**log10 Y to ln).
* PZT11 tau and phi: the paper gives only the total; quakefolio returns NaN and
  ``has_tau_phi = False``, pygmm has none to compare.
* AG16: no departure found on the compared paths (median Eqs. 1-5, sigma).
  pygmm's ``adjust_c1`` default is the central Delta C1 branch (intraslab -0.3;
  interface 0.2 to -0.2 between 0.3 and 3 s, linear in ln period), which is
  the one quakefolio implements; pygmm has no tau/phi arrays for this model,
  so its table columns (Table 3) are the oracle for them.
"""

from __future__ import annotations

import contextlib
import logging
import math
import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.stats import norm

from quakefolio.core.gmm import (
    GMM_REGISTRY,
    TECTONIC_REGIONS,
    Ag16,
    GmmInput,
    Pzt11,
    get_gmm,
    im_period_s,
    models_for_region,
)
from quakefolio.core.hazard import compute_site_hazard, hazard_from_pairs, pair_index

pygmm = pytest.importorskip("pygmm")

N_SCENARIOS = 300
SEED = 20240917
ATOL_LN = 1e-6
LN10 = math.log(10.0)
# SA_0.27 and SA_1.25 are tabulated in neither model; SA_0.6 and SA_2.5 only in AG16
AG16_IMS = (
    "PGA", "SA_0.02", "SA_0.1", "SA_0.2", "SA_0.27", "SA_0.6", "SA_1.0", "SA_1.25", "SA_2.5",
    "SA_3.0", "SA_10.0",
)
PZT11_IMS = ("SA_0.01",) + AG16_IMS


@contextlib.contextmanager
def _quiet():
    """Silence pygmm's warnings about its recommended limits (scoped)."""
    previous = logging.root.manager.disable
    logging.disable(logging.WARNING)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield
    finally:
        logging.disable(previous)


def _interp_rows(model, values: np.ndarray, ims) -> np.ndarray:
    """pygmm per-row values at the IMs: PGA row, or ln-period interpolation over its SA rows."""
    sa = model.INDICES_PSA
    ln_periods = np.log(model.PERIODS[sa])
    out = np.empty(len(ims))
    for j, im in enumerate(ims):
        period = im_period_s(im)
        out[j] = values[model.INDEX_PGA] if period == 0.0 else np.interp(
            np.log(period), ln_periods, values[sa])
    return out


# --------------------------------------------------------------------------- #
# AG16: scenarios, ours, oracle
# --------------------------------------------------------------------------- #
def _ag16_scenarios(rng: np.random.Generator, n: int) -> dict:
    """Random subduction scenarios, half interface and half intraslab, half backarc.

    Interface: M 6.0-9.2, Rrup 5-300 km (log-uniform). Intraslab: M 5.0-8.0,
    hypocentral depth 20-160 km (across the 120 km cap of Eq. 3), epicentral
    distance 1-300 km, Rhypo from both. Distances straddle the 85 and 100 km
    floors of Eq. 4. Vs30 log-uniform 150-1500 m/s (nonlinear and linear site
    branches, and V* capped at 1000 m/s). The distance a scenario does not use
    gets an unrelated value, so that using the wrong one would show.
    """
    slab = rng.uniform(size=n) < 0.5
    backarc = rng.uniform(size=n) < 0.5
    mag = np.where(slab, rng.uniform(5.0, 8.0, n), rng.uniform(6.0, 9.2, n))
    zhyp = np.where(slab, rng.uniform(20.0, 160.0, n), rng.uniform(8.0, 40.0, n))
    repi = 10.0 ** rng.uniform(0.0, np.log10(300.0), n)
    rrup_interface = 10.0 ** rng.uniform(np.log10(5.0), np.log10(300.0), n)
    rhyp = np.where(slab, np.hypot(repi, zhyp), rng.uniform(10.0, 400.0, n))
    rrup = np.where(slab, rng.uniform(5.0, 300.0, n), rrup_interface)
    vs30 = np.exp(rng.uniform(np.log(150.0), np.log(1500.0), n))
    # interface: the hypocentral depth is not used; half of them unknown (NaN)
    zhyp = np.where(~slab & (rng.uniform(size=n) < 0.5), np.nan, zhyp)
    return dict(slab=slab, backarc=backarc, mag=mag, zhyp=zhyp, rhyp=rhyp, rrup=rrup, vs30=vs30)


def _ag16_input(sc: dict, idx=slice(None)) -> GmmInput:
    return GmmInput(
        mag=sc["mag"][idx], vs30_mps=sc["vs30"][idx], rrup_km=sc["rrup"][idx],
        rhyp_km=sc["rhyp"][idx], zhyp_km=sc["zhyp"][idx], intraslab=sc["slab"][idx],
        backarc=sc["backarc"][idx],
    )


def _ag16_oracle(sc: dict) -> dict[str, np.ndarray]:
    n = sc["mag"].size
    out = {k: np.empty((len(AG16_IMS), n)) for k in ("ln", "tau", "phi", "sigma")}
    for i in range(n):
        slab = bool(sc["slab"][i])
        m = pygmm.AbrahamsonGregorAddo2016(
            pygmm.Scenario(
                mag=sc["mag"][i],
                v_s30=sc["vs30"][i],
                event_type="intraslab" if slab else "interface",
                tectonic_region="backarc" if sc["backarc"][i] else "forearc",
                dist_rup=None if slab else sc["rrup"][i],
                dist_hyp=sc["rhyp"][i] if slab else None,
                depth_hyp=sc["zhyp"][i] if slab else None,
            )
        )
        out["ln"][:, i] = _interp_rows(m, m._ln_resp, AG16_IMS)
        out["sigma"][:, i] = _interp_rows(m, m._ln_std, AG16_IMS)
        out["tau"][:, i] = _interp_rows(m, np.asarray(m.COEFF["tau"]), AG16_IMS)
        out["phi"][:, i] = _interp_rows(m, np.asarray(m.COEFF["phi"]), AG16_IMS)
    return out


@pytest.fixture(scope="module")
def ag16_pair():
    sc = _ag16_scenarios(np.random.default_rng(SEED), N_SCENARIOS)
    res = get_gmm("AG16").evaluate(_ag16_input(sc), AG16_IMS)
    ours = {"ln": res.ln_median, "tau": res.tau, "phi": res.phi, "sigma": res.sigma}
    with _quiet():
        oracle = _ag16_oracle(sc)
    return sc, ours, oracle


# --------------------------------------------------------------------------- #
# PZT11: scenarios, ours, oracle
# --------------------------------------------------------------------------- #
def _pzt11_scenarios(rng: np.random.Generator, n: int) -> dict:
    """M 5.0-8.0 (across the M 7 sigma break), Rrup 0-1000 km (log-uniform from 0.5 km,
    across the 70 and 140 km hinges), a few at Rrup = 0."""
    rrup = 10.0 ** rng.uniform(np.log10(0.5), 3.0, n)
    rrup[:5] = 0.0
    return dict(mag=rng.uniform(5.0, 8.0, n), rrup=rrup)


def _pzt11_oracle(sc: dict) -> dict[str, np.ndarray]:
    n = sc["mag"].size
    out = {k: np.empty((len(PZT11_IMS), n)) for k in ("ln", "sigma")}
    for i in range(n):
        m = pygmm.PezeshkZandiehTavakoli2011(pygmm.Scenario(mag=sc["mag"][i], dist_rup=sc["rrup"][i]))
        out["ln"][:, i] = _interp_rows(m, m._ln_resp, PZT11_IMS)
        # pygmm's "_ln_std" is the paper's log10 standard deviation (module docstring)
        out["sigma"][:, i] = LN10 * _interp_rows(m, m._ln_std, PZT11_IMS)
    return out


@pytest.fixture(scope="module")
def pzt11_pair():
    sc = _pzt11_scenarios(np.random.default_rng(SEED + 1), N_SCENARIOS)
    inp = GmmInput(mag=sc["mag"], rrup_km=sc["rrup"], vs30_mps=Pzt11.REFERENCE_VS30_MPS)
    res = get_gmm("PZT11").evaluate(inp, PZT11_IMS)
    with _quiet():
        oracle = _pzt11_oracle(sc)
    return sc, res, oracle


# --------------------------------------------------------------------------- #
# Oracle comparisons
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("quantity", ["ln", "sigma", "tau", "phi"])
def test_ag16_matches_pygmm(ag16_pair, quantity):
    # oracle: pygmm 0.8.0 scalar AG16; Abrahamson, Gregor & Addo (2016) Eqs. 1-5, Table 3
    _, ours, oracle = ag16_pair
    assert np.isfinite(ours[quantity]).all()
    assert_allclose(ours[quantity], oracle[quantity], rtol=0.0, atol=ATOL_LN)


def test_ag16_sample_covers_every_branch(ag16_pair):
    # both event types on both sides of the arc, both site branches of Eq. 5, depths
    # beyond the Eq. 3 cap and distances on both sides of the Eq. 4 floors
    sc, _, _ = ag16_pair
    slab, back = sc["slab"], sc["backarc"]
    for event in (slab, ~slab):
        for arc in (back, ~back):
            assert (event & arc).sum() >= 40
    assert (slab & (sc["zhyp"] > 120.0)).sum() >= 10
    assert (slab & (sc["rhyp"] < 85.0)).sum() >= 10 and (slab & (sc["rhyp"] > 85.0)).sum() >= 10
    assert (~slab & (sc["rrup"] < 100.0)).sum() >= 10 and (~slab & (sc["rrup"] > 100.0)).sum() >= 10
    assert (sc["vs30"] < 400.0).sum() >= 30 and (sc["vs30"] > 1000.0).sum() >= 30


@pytest.mark.parametrize("quantity", ["ln", "sigma"])
def test_pzt11_matches_pygmm(pzt11_pair, quantity):
    # oracle: pygmm 0.8.0 scalar PZT11, its sigma times ln(10) (module docstring);
    # Pezeshk, Zandieh & Tavakoli (2011) Eqs. 4-6 (equation numbers from memory)
    _, res, oracle = pzt11_pair
    ours = res.ln_median if quantity == "ln" else res.sigma
    assert np.isfinite(ours).all()
    assert_allclose(ours, oracle[quantity], rtol=0.0, atol=ATOL_LN)


def test_pzt11_publishes_total_sigma_only(pzt11_pair):
    _, res, _ = pzt11_pair
    assert not Pzt11.has_tau_phi and not Pzt11.uses_vs30
    assert np.isnan(res.tau).all() and np.isnan(res.phi).all()
    # natural-log sigma of the M <= 7 branch, from the coefficients directly (PGA row)
    c = Pzt11().coefficients
    row = int(np.flatnonzero(c["period"] == 0.0)[0])
    s_log = c["c_12"][row] * 6.0 + c["c_13"][row]
    expected = LN10 * math.hypot(s_log, c["sigma_reg"][row])
    got = Pzt11().evaluate(GmmInput(mag=6.0, rrup_km=30.0, vs30_mps=2000.0), "PGA").sigma
    assert_allclose(got, expected, rtol=1e-14)
    assert 0.5 < expected < 0.7


# --------------------------------------------------------------------------- #
# AG16 details
# --------------------------------------------------------------------------- #
def _slab_point(**kw) -> GmmInput:
    base = dict(mag=7.0, vs30_mps=760.0, rhyp_km=90.0, zhyp_km=60.0, intraslab=1)
    base.update(kw)
    return GmmInput(**base)


def test_ag16_delta_c1_central_branch():
    model = Ag16()
    periods = np.array([0.0, 0.02, 0.3, 0.5, 1.0, 2.0, 3.0, 10.0])
    assert_allclose(model.delta_c1(periods, 0), [0.2, 0.2, 0.2, 0.1, 0.0, -0.1, -0.2, -0.2], atol=1e-15)
    assert_allclose(model.delta_c1(periods, 1), -0.3, atol=0.0)
    # between tabulated values: linear in ln(period)
    assert_allclose(model.delta_c1(math.sqrt(0.5 * 1.0), 0), 0.05, atol=1e-15)


def test_ag16_depth_term_capped_at_120_km():
    # Eq. 3: f_depth = theta11 (min(Zh, 120) - 60); same Rhypo, different depths
    model = Ag16()
    ims = ["PGA", "SA_0.2", "SA_1.0"]
    deep = model.evaluate(_slab_point(zhyp_km=[120.0, 150.0, 200.0]), ims)
    assert np.abs(deep.ln_median[:, 1:] - deep.ln_median[:, :1]).max() <= 1e-14
    # on the linear site branch (Vs30 1200 m/s >= every V_lin) 10 km deeper adds 10 theta11
    shallow = model.evaluate(_slab_point(zhyp_km=[50.0, 60.0], vs30_mps=1200.0), ims)
    c = model.coefficients
    rows = [int(np.flatnonzero(c["period"] == im_period_s(im))[0]) for im in ims]
    assert_allclose(shallow.ln_median[:, 1] - shallow.ln_median[:, 0], 10.0 * c["t_11"][rows], atol=1e-12)


def test_ag16_forearc_is_the_default_and_backarc_adds_eq4():
    # Eq. 4 on a site-linear scenario (Vs30 1200 m/s >= every V_lin): backarc minus forearc
    # is f_FABA exactly; backarc=None equals backarc=0.
    model = Ag16()
    ims = ["PGA", "SA_0.2", "SA_1.0", "SA_3.0"]
    c = model.coefficients
    rows = [int(np.flatnonzero(c["period"] == im_period_s(im))[0]) for im in ims]
    r = np.array([30.0, 85.0, 150.0, 280.0])
    for slab in (0, 1):
        kw = dict(mag=7.5, vs30_mps=1200.0, rrup_km=r, rhyp_km=r, zhyp_km=70.0, intraslab=slab)
        none = model.evaluate(GmmInput(**kw), ims)
        fore = model.evaluate(GmmInput(**kw, backarc=0), ims)
        back = model.evaluate(GmmInput(**kw, backarc=1), ims)
        assert_allclose(none.ln_median, fore.ln_median, rtol=0.0, atol=0.0)
        if slab:
            expected = c["t_7"][rows][:, None] + c["t_8"][rows][:, None] * np.log(np.maximum(r, 85.0) / 40.0)
        else:
            expected = c["t_15"][rows][:, None] + c["t_16"][rows][:, None] * np.log(np.maximum(r, 100.0) / 40.0)
        assert_allclose(back.ln_median - fore.ln_median, expected, rtol=0.0, atol=1e-12)


def test_ag16_uses_rrup_for_interface_and_rhypo_for_intraslab():
    model = Ag16()
    a = model.evaluate(GmmInput(mag=8.0, vs30_mps=500.0, rrup_km=60.0, rhyp_km=[70.0, 200.0], intraslab=0), "PGA")
    assert a.ln_median[0, 0] == a.ln_median[0, 1]
    b = model.evaluate(_slab_point(rrup_km=[50.0, 90.0]), "PGA")
    assert b.ln_median[0, 0] == b.ln_median[0, 1]
    # a batch of intraslab scenarios needs no Rrup, a batch of interface ones no Rhypo or depth
    model.evaluate(_slab_point(), "PGA")
    model.evaluate(GmmInput(mag=8.0, vs30_mps=500.0, rrup_km=60.0, intraslab=0), "PGA")


def test_ag16_inputs_are_loud():
    model = Ag16()
    with pytest.raises(ValueError, match="AG16 requires GmmInput.intraslab; it is None"):
        model.evaluate(GmmInput(mag=7.0, vs30_mps=400.0, rrup_km=50.0), "PGA")
    with pytest.raises(ValueError, match=r"AG16 \(interface scenarios\) requires GmmInput.rrup_km"):
        model.evaluate(_slab_point(intraslab=[1, 0]), "PGA")
    with pytest.raises(ValueError, match=r"AG16 \(intraslab scenarios\) requires GmmInput.rhyp_km"):
        model.evaluate(GmmInput(mag=7.0, vs30_mps=400.0, rrup_km=50.0, zhyp_km=60.0, intraslab=1), "PGA")
    with pytest.raises(ValueError, match=r"'zhyp_km' must be given for intraslab scenarios; got NaN at index \(1,\)"):
        model.evaluate(_slab_point(zhyp_km=[60.0, np.nan]), "PGA")
    with pytest.raises(ValueError, match="'intraslab' must be 0 or 1; got 0.5"):
        GmmInput(mag=7.0, vs30_mps=400.0, intraslab=0.5)
    with pytest.raises(ValueError, match="'backarc' must be 0 or 1; got nan"):
        GmmInput(mag=7.0, vs30_mps=400.0, backarc=np.nan)
    with pytest.raises(ValueError, match="'rhyp_km' must be finite and >= 0; got -1.0"):
        GmmInput(mag=7.0, vs30_mps=400.0, rhyp_km=-1.0)
    with pytest.raises(ValueError, match="AG16: region 'japan' not supported; valid: global"):
        model.evaluate(_slab_point(region="japan"), "PGA")
    with pytest.raises(ValueError, match=r"AG16: intensity measure 'SA_0.01' .*outside"):
        model.evaluate(_slab_point(), "SA_0.01")


@pytest.mark.parametrize("slab", [0, 1])
@pytest.mark.parametrize("backarc", [0, 1])
def test_ag16_median_non_increasing_with_distance_on_rock(slab, backarc):
    # Valid on the linear site branch (Vs30 >= 1100 m/s > every V_lin): on softer sites the
    # nonlinear term of Eq. 5 deamplifies less as PGA_1000 falls, which may raise short-period
    # medians slightly with distance (model behaviour; the oracle test covers it).
    mag = np.array([5.5, 6.5, 7.5, 8.5, 9.0])[:, None, None]
    vs30 = np.array([1100.0, 1500.0])[None, :, None]
    r = np.linspace(1.0, 300.0, 300)[None, None, :]
    inp = GmmInput(mag=mag, vs30_mps=vs30, rrup_km=r, rhyp_km=np.hypot(r, 50.0), zhyp_km=50.0,
                   intraslab=slab, backarc=backarc)
    res = get_gmm("AG16").evaluate(inp, list(AG16_IMS))
    assert np.diff(res.ln_median, axis=-1).max() <= 1e-12


@pytest.mark.parametrize("name", ["AG16", "PZT11"])
def test_periods_interpolation_and_range(name):
    model = get_gmm(name)
    inp = _slab_point() if name == "AG16" else GmmInput(mag=6.5, rrup_km=[5.0, 80.0, 400.0], vs30_mps=2000.0)
    res = model.evaluate(inp, model.supported_ims)
    assert np.isfinite(res.ln_median).all() and (res.sigma > 0).all()
    if model.has_tau_phi:
        assert_allclose(res.sigma**2, res.tau**2 + res.phi**2, rtol=1e-12)
    periods = model.tabulated_periods_s
    j = int(np.searchsorted(periods, 1.1))
    t_lo, t_hi = periods[j - 1], periods[j]
    mid = model.evaluate(inp, [f"SA_{t_lo:g}", f"SA_{math.sqrt(t_lo * t_hi)!r}", f"SA_{t_hi:g}"])
    assert_allclose(mid.ln_median[1], 0.5 * (mid.ln_median[0] + mid.ln_median[2]), rtol=0.0, atol=1e-12)
    assert_allclose(mid.sigma[1], 0.5 * (mid.sigma[0] + mid.sigma[2]), rtol=0.0, atol=1e-12)
    lo, hi = model.period_range_s
    for bad in (f"SA_{hi * 2:g}", f"SA_{lo / 2:g}"):
        with pytest.raises(ValueError, match=rf"{name}: intensity measure '{bad}'.*outside"):
            model.evaluate(inp, ["PGA", bad])


# --------------------------------------------------------------------------- #
# Registry, regions, crustal models unchanged
# --------------------------------------------------------------------------- #
def test_every_model_names_its_tectonic_regions():
    for name, model in GMM_REGISTRY.items():
        assert model.tectonic_regions and set(model.tectonic_regions) <= set(TECTONIC_REGIONS), name
    assert models_for_region("active_crustal") == ("BSSA14", "CB14", "ASK14", "CY14", "I14")
    assert models_for_region("subduction_interface") == ("AG16",)
    assert models_for_region("subduction_intraslab") == ("AG16",)
    assert models_for_region("stable_continental") == ("PZT11",)
    with pytest.raises(ValueError, match="unknown tectonic region 'oceanic'; valid: active_crustal"):
        models_for_region("oceanic")


@pytest.mark.parametrize("name", ["BSSA14", "CB14", "ASK14", "CY14", "I14"])
def test_crustal_models_ignore_the_subduction_fields(name):
    rng = np.random.default_rng(3)
    n = 50
    dist = rng.uniform(0.0, 200.0, n)
    common = dict(
        mag=rng.uniform(5.0, 7.5, n), vs30_mps=rng.uniform(200.0, 1200.0, n), rrup_km=np.hypot(dist, 3.0),
        rjb_km=dist, rx_km=dist, ztor_km=3.0, zhyp_km=9.0, dip_deg=90.0, rake_deg=0.0, width_km=12.0,
    )
    ims = ["PGA", "SA_0.2", "SA_1.0"]
    plain = get_gmm(name).evaluate(GmmInput(**common), ims)
    extra = get_gmm(name).evaluate(
        GmmInput(**common, rhyp_km=dist + 40.0, intraslab=rng.integers(0, 2, n), backarc=1), ims)
    for a, b in zip((plain.ln_median, plain.sigma, plain.tau, plain.phi),
                    (extra.ln_median, extra.sigma, extra.tau, extra.phi)):
        assert_allclose(a, b, rtol=0.0, atol=0.0)


# --------------------------------------------------------------------------- #
# Closed form: hazard of an intraslab point source
# --------------------------------------------------------------------------- #
def test_intraslab_point_source_hazard_matches_closed_form():
    r"""lambda(IM > x) = nu (1 - Phi((ln x - mu) / sigma)) for one rupture (Cornell 1968).

    Invented source: an intraslab point source at 55 km depth, M 7.2, 2e-3 per year;
    four sites at epicentral distances 0, 40, 120 and 250 km (Rhypo from depth and
    epicentral distance), Vs30 250-900 m/s, the last site in the backarc. The curves
    of ``hazard_from_pairs`` (the engine's rate-weighted sum of P(IM > x | rupture))
    are compared with the closed form from the model's own median and sigma, and from
    pygmm's scalar AG16 (independent oracle). With truncation at 3 sigma the closed form
    is nu [Phi(-eps) - Phi(-3)] / [1 - 2 Phi(-3)], clipped at 0.

    Here the kernel is fed the model's values directly; the same check through
    ``compute_site_hazard`` (rupture region, hypocentral distance, backarc flag) follows.
    """
    nu, mag, depth = 2e-3, 7.2, 55.0
    repi = np.array([0.0, 40.0, 120.0, 250.0])
    vs30 = np.array([250.0, 400.0, 900.0, 600.0])
    backarc = np.array([0, 0, 0, 1])
    rhyp = np.hypot(repi, depth)
    ims = ["PGA", "SA_0.2", "SA_1.0", "SA_3.0"]
    res = get_gmm("AG16").evaluate(
        GmmInput(mag=mag, vs30_mps=vs30, rhyp_km=rhyp, zhyp_km=depth, intraslab=1, backarc=backarc), ims)
    with _quiet():
        oracle = [pygmm.AbrahamsonGregorAddo2016(pygmm.Scenario(
            mag=mag, v_s30=float(v), dist_hyp=float(r), depth_hyp=depth, event_type="intraslab",
            tectonic_region="backarc" if b else "forearc")) for v, r, b in zip(vs30, rhyp, backarc)]
    mu_o = np.array([_interp_rows(m, m._ln_resp, ims) for m in oracle]).T
    sd_o = np.array([_interp_rows(m, m._ln_std, ims) for m in oracle]).T

    levels = np.geomspace(1e-4, 3.0, 40)
    lnx = np.log(levels)
    site, _, starts, owners = pair_index(np.ones((len(repi), 1), dtype=bool))
    rate = np.full(site.size, nu)
    for i in range(len(ims)):
        mu, sd = res.ln_median[i], res.sigma[i]
        got = hazard_from_pairs(lnx, mu, sd, rate, starts, owners, len(repi))
        eps = (lnx[None, :] - mu[:, None]) / sd[:, None]
        assert_allclose(got, nu * norm.sf(eps), rtol=1e-12, atol=0.0)
        eps_o = (lnx[None, :] - mu_o[i][:, None]) / sd_o[i][:, None]
        assert_allclose(got, nu * norm.sf(eps_o), rtol=1e-5, atol=1e-300)
        trunc = hazard_from_pairs(lnx, mu, sd, rate, starts, owners, len(repi), truncation_sigma=3.0)
        p3 = norm.sf(3.0)
        expected = nu * np.clip((norm.sf(eps) - p3) / (1.0 - 2.0 * p3), 0.0, 1.0)
        assert_allclose(trunc, expected, rtol=1e-10, atol=1e-18)
    # the curves span the interesting range: near 2e-3 at small x, far below it at large x
    assert got[:, 0].min() > 0.99 * nu and got[0, -1] < 1e-2 * nu


def test_stable_continental_hazard_runs_and_event_motion_refuses_total_sigma_models():
    # PZT11 needs only M and Rrup, which the engine's pairs carry: its curve for one
    # rupture equals nu (1 - Phi(eps)) at the engine's own Rrup (Cornell 1968).
    from quakefolio.core.hazard import compute_site_hazard, rupture_ground_motion
    from quakefolio.core.sources.geometry import pair_distances
    from quakefolio.core.sources.mfd import single_magnitude
    from quakefolio.core.sources.ruptures import point_source_ruptures

    rs = point_source_ruptures("scr", 10.0, 20.0, mfd=single_magnitude(6.0, 0.01), hypo_depths=[(10.0, 1.0)],
                               mechanisms=[(0, 90, 0, 1.0)], upper_depth_km=0.0, lower_depth_km=20.0)
    assert len(rs) == 1
    lon, lat, ref = np.array([10.3]), np.array([20.1]), (10.0, 20.0)
    levels = np.geomspace(1e-3, 1.0, 20)
    model = get_gmm("PZT11")
    got = compute_site_hazard(lon, lat, [760.0], rs, [model], ["PGA"], levels, ref=ref)[0, 0, 0]
    rrup = pair_distances(lon, lat, rs, [0], [0], ref_lon=ref[0], ref_lat=ref[1])["rrup_km"]
    res = model.evaluate(GmmInput(mag=6.0, rrup_km=rrup, vs30_mps=760.0), "PGA")
    expected = rs.rate[0] * norm.sf((np.log(levels) - res.ln_median[0, 0]) / res.sigma[0, 0])
    assert_allclose(got, expected, rtol=1e-12)
    with pytest.raises(ValueError, match="PZT11: the model gives only a total sigma"):
        rupture_ground_motion(lon, lat, np.array([760.0]), rs, [model], ["PGA"], ref=ref)


# --------------------------------------------------------------------------- #
# Closed form through the engine: tectonic regions of a rupture set
# --------------------------------------------------------------------------- #
def _slab_source(nu=2e-3, mag=7.2, depth=55.0, lon=140.0, lat=-10.0):
    from quakefolio.core.sources.mfd import single_magnitude
    from quakefolio.core.sources.ruptures import point_source_ruptures

    rs = point_source_ruptures("slab", lon, lat, mfd=single_magnitude(mag, nu), hypo_depths=[(depth, 1.0)],
                               mechanisms=[(0.0, 90.0, -90.0, 1.0)], upper_depth_km=40.0, lower_depth_km=70.0)
    return rs.with_region("subduction_intraslab")


def _sites_east(repi_km, lon=140.0, lat=-10.0):
    from quakefolio.core.sources.geometry import aeqd_inverse

    return aeqd_inverse(np.asarray(repi_km, dtype=float), np.zeros(len(repi_km)), lon, lat)


def test_intraslab_point_source_through_the_engine_matches_closed_form():
    r"""compute_site_hazard on an intraslab rupture: nu (1 - Phi(eps)) with AG16 at Rhypo (Cornell 1968).

    Invented source: one intraslab rupture (point source at 55 km depth, M 7.2, 2e-3 per
    year, vertical plane within 40-70 km); sites due east at epicentral distances 0, 40,
    120 and 250 km (exact in the engine's projection about the epicentre), the last in
    the backarc (``site_fields``). The closed form takes Rhypo = sqrt(Repi^2 + 55^2)
    computed here, the model's median and sigma, and, as an independent oracle,
    pygmm's scalar AG16; with truncation at 3 sigma,
    nu [Phi(-eps) - Phi(-3)] / [1 - 2 Phi(-3)], clipped at 0.
    """
    nu, mag, depth = 2e-3, 7.2, 55.0
    rs = _slab_source(nu, mag, depth)
    assert len(rs) == 1 and rs.regions == ("subduction_intraslab",)
    assert rs.zhyp_km[0] == depth
    repi = np.array([0.0, 40.0, 120.0, 250.0])
    lon, lat = _sites_east(repi)
    vs30 = np.array([250.0, 400.0, 900.0, 600.0])
    backarc = np.array([0.0, 0.0, 0.0, 1.0])
    ims = ["PGA", "SA_0.2", "SA_1.0", "SA_3.0"]
    levels = np.geomspace(1e-4, 3.0, 40)
    model = get_gmm("AG16")
    kw = dict(max_distance_km=300.0, ref=(140.0, -10.0), region_branches={"subduction_intraslab": [(1.0, model)]},
              site_fields={"backarc": backarc})
    # the crustal branches (here two) see no crustal rupture: each carries the intraslab mean
    got = compute_site_hazard(lon, lat, vs30, rs, [get_gmm("BSSA14"), get_gmm("CB14")], ims, levels, **kw)
    assert_allclose(got[0], got[1], rtol=0, atol=0)
    trunc = compute_site_hazard(lon, lat, vs30, rs, [get_gmm("BSSA14")], ims, levels, truncation_sigma=3.0, **kw)[0]
    rhyp = np.hypot(repi, depth)
    res = model.evaluate(GmmInput(mag=mag, vs30_mps=vs30, rhyp_km=rhyp, zhyp_km=depth, intraslab=1, backarc=backarc),
                         ims)
    with _quiet():
        oracle = [pygmm.AbrahamsonGregorAddo2016(pygmm.Scenario(
            mag=mag, v_s30=float(v), dist_hyp=float(r), depth_hyp=depth, event_type="intraslab",
            tectonic_region="backarc" if b else "forearc")) for v, r, b in zip(vs30, rhyp, backarc)]
    mu_o = np.array([_interp_rows(m, m._ln_resp, ims) for m in oracle]).T
    sd_o = np.array([_interp_rows(m, m._ln_std, ims) for m in oracle]).T
    lnx = np.log(levels)
    p3 = norm.sf(3.0)
    for i in range(len(ims)):
        eps = (lnx[None, :] - res.ln_median[i][:, None]) / res.sigma[i][:, None]
        assert_allclose(got[0, i], nu * norm.sf(eps), rtol=1e-9, atol=0.0)
        eps_o = (lnx[None, :] - mu_o[i][:, None]) / sd_o[i][:, None]
        assert_allclose(got[0, i], nu * norm.sf(eps_o), rtol=1e-5, atol=1e-300)
        assert_allclose(trunc[i], nu * np.clip((norm.sf(eps) - p3) / (1 - 2 * p3), 0, 1), rtol=1e-9, atol=1e-18)
    assert got[0, 0, :, 0].min() > 0.99 * nu and got[0, 0, 0, -1] < 1e-2 * nu


def test_interface_fault_through_the_engine_matches_closed_form():
    r"""compute_site_hazard on one interface rupture: nu (1 - Phi(eps)) with AG16 at Rrup (Cornell 1968).

    Invented source: a planar interface fault, trace due north along 140 E from 10.45 S to
    9.55 S (100 km), dipping 20 degrees east between 10 and 30 km depth, M 8.5 at 1e-3 per
    year; the magnitude's rupture is larger than the fault, so its one rupture is the whole
    plane. Sites due east of the trace's midpoint at 0 to 250 km (exact in the engine's
    projection about it), one of them in the backarc. Rrup closed form: in the vertical
    section through the sites the plane is the segment s (cos d, sin d), s from 10/sin d
    to 30/sin d, so a site at x has Rrup = |(x, 0) - t (cos d, sin d)| with
    t = clip(x cos d) (the segment's nearest point; the sites face the middle of the
    100 km length). The hazard takes the model's median and sigma at that Rrup and, as an
    independent oracle, pygmm's scalar AG16 (interface, dist_rup).
    """
    from quakefolio.core.sources.mfd import single_magnitude
    from quakefolio.core.sources.ruptures import planar_fault_ruptures

    nu, mag, dip = 1e-3, 8.5, np.radians(20.0)
    rs = planar_fault_ruptures("interface", [[140.0, -10.45], [140.0, -9.55]], dip_deg=20.0, upper_depth_km=10.0,
                               lower_depth_km=30.0, rake_deg=90.0, mfd=single_magnitude(mag, nu))
    rs = rs.with_region("subduction_interface")
    assert len(rs) == 1 and rs.ztor_km[0] == 10.0 and rs.zbot_km[0] == 30.0
    x = np.array([0.0, 30.0, 60.0, 100.0, 150.0, 250.0])
    lon, lat = _sites_east(x)
    t = np.clip(x * np.cos(dip), 10.0 / np.sin(dip), 30.0 / np.sin(dip))
    rrup = np.hypot(x - t * np.cos(dip), t * np.sin(dip))
    vs30 = np.array([300.0, 450.0, 760.0, 250.0, 600.0, 900.0])
    backarc = np.array([0.0, 0.0, 0.0, 0.0, 0.0, 1.0])
    ims = ["PGA", "SA_0.2", "SA_1.0", "SA_3.0"]
    levels = np.geomspace(1e-4, 3.0, 40)
    model = get_gmm("AG16")
    got = compute_site_hazard(lon, lat, vs30, rs, [get_gmm("CB14")], ims, levels, max_distance_km=300.0,
                              ref=(140.0, -10.0), region_branches={"subduction_interface": [(1.0, model)]},
                              site_fields={"backarc": backarc})[0]
    res = model.evaluate(GmmInput(mag=mag, vs30_mps=vs30, rrup_km=rrup, intraslab=0, backarc=backarc), ims)
    with _quiet():
        oracle = [pygmm.AbrahamsonGregorAddo2016(pygmm.Scenario(
            mag=mag, v_s30=float(v), dist_rup=float(r), event_type="interface",
            tectonic_region="backarc" if b else "forearc")) for v, r, b in zip(vs30, rrup, backarc)]
    mu_o = np.array([_interp_rows(m, m._ln_resp, ims) for m in oracle]).T
    sd_o = np.array([_interp_rows(m, m._ln_std, ims) for m in oracle]).T
    lnx = np.log(levels)
    for i in range(len(ims)):
        eps = (lnx[None, :] - res.ln_median[i][:, None]) / res.sigma[i][:, None]
        assert_allclose(got[i], nu * norm.sf(eps), rtol=1e-7, atol=1e-300)
        eps_o = (lnx[None, :] - mu_o[i][:, None]) / sd_o[i][:, None]
        assert_allclose(got[i], nu * norm.sf(eps_o), rtol=1e-5, atol=1e-300)
    assert got[0, :, 0].min() > 0.99 * nu and got[0, 0, -1] < 1e-2 * nu


def test_regions_sum_and_branch_weights_give_the_combination_mean():
    # A crustal rupture and an intraslab one: branch g is crustal(g) + sum_k w_k slab(k), so the
    # weighted mean over g equals the mean over all (crustal, slab) combinations with product
    # weights (linearity of the hazard sum, Cornell 1968); computed here by brute force.
    from quakefolio.core.sources.mfd import single_magnitude
    from quakefolio.core.sources.ruptures import RuptureSet, point_source_ruptures

    crustal = point_source_ruptures("crust", 140.2, -10.0, mfd=single_magnitude(6.0, 0.01),
                                    hypo_depths=[(10.0, 1.0)], mechanisms=[(0.0, 90.0, 0.0, 1.0)],
                                    upper_depth_km=0.0, lower_depth_km=20.0)
    slab = _slab_source()
    both = RuptureSet.concat([crustal, slab])
    assert both.regions == ("active_crustal", "subduction_intraslab")
    lon, lat = _sites_east([10.0, 80.0])
    vs30 = np.array([400.0, 760.0])
    levels = np.geomspace(1e-3, 2.0, 15)
    ag = get_gmm("AG16")
    crust_models, wc = [get_gmm("BSSA14"), get_gmm("ASK14")], [0.4, 0.6]
    kw = dict(max_distance_km=300.0, ref=(140.0, -10.0))
    slab_branches = [(0.3, ag), (0.7, ag)]  # the same model twice: the mean is that model's curve
    got = compute_site_hazard(lon, lat, vs30, both, crust_models, ["PGA"], levels,
                              region_branches={"subduction_intraslab": slab_branches}, **kw)
    c = compute_site_hazard(lon, lat, vs30, crustal, crust_models, ["PGA"], levels, **kw)
    s = compute_site_hazard(lon, lat, vs30, slab, [get_gmm("BSSA14")], ["PGA"], levels,
                            region_branches={"subduction_intraslab": [(1.0, ag)]}, **kw)[0]
    combos = sum(wg * ws * (c[g] + s) for g, wg in enumerate(wc) for ws, _ in slab_branches)
    assert_allclose(np.tensordot(wc, got, axes=(0, 0)), combos, rtol=1e-12)
    assert_allclose(got, c + s[None], rtol=1e-12)
    with pytest.raises(ValueError, match="subduction_intraslab region have no ground-motion branches"):
        compute_site_hazard(lon, lat, vs30, both, crust_models, ["PGA"], levels, **kw)
