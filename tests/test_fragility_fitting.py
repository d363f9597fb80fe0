"""Fragility fitting (DESIGN.md section 4): multiple-stripe maximum likelihood, IDA moments,
truncated-IDA censored likelihood, dispersion by square root of sum of squares, goodness of
fit, and the ``fit-fragility`` command.

Method: Baker (2015), Earthquake Spectra 31(1); equation numbers as quoted in
``quakefolio.fragility.fitting`` (from memory).
"""
import ast
import json
import math
import shutil
import stat
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize, stats

from quakefolio.core.risk import lognormal_crossing_im
from quakefolio.fragility.fitting import (
    CROSSING_TOLERANCE,
    combine_dispersion,
    fit_ida,
    fit_ida_truncated,
    fit_msa,
    library_to_toml,
    set_damage_state,
)
from quakefolio.fragility.library import load_library, parse_library
from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.cli import main

REPO = Path(__file__).resolve().parents[1]
DEMO_LIBRARY = REPO / "demo_portfolio" / "fragility_library.toml"
EXAMPLE_MSA = REPO / "demo_portfolio" / "fragility_msa_example.csv"
STRIPES = np.geomspace(0.15, 2.5, 10)


def _simulate_msa(rng, median, beta, ims, n):
    n = np.broadcast_to(n, np.shape(ims)).astype(float)
    return n, rng.binomial(n.astype(int), stats.norm.cdf(np.log(ims / median) / beta)).astype(float)


def _ab_to_median_beta_jacobian(a, b):
    # p = Phi(a + b ln x): ln median = -a/b, beta = 1/b
    return np.array([[-1.0 / b, a / b**2], [0.0, -1.0 / b**2]])


# ---------------------------------------------------------------------------------------------
# multiple-stripe analysis: binomial maximum likelihood (Baker 2015, Eq. 11-12)
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("case", ["equal_stripes", "unequal_and_repeated"])
def test_msa_mle_equals_statsmodels_probit_glm(case):
    # Reference: statsmodels GLM, Binomial family with probit link on (successes, failures) endog and
    # exog [1, ln IM]; median = exp(-b0/b1), beta = 1/b1 (the fragility function is a probit model in ln IM).
    from statsmodels.genmod import families
    from statsmodels.genmod.generalized_linear_model import GLM

    rng = np.random.default_rng(20150101)
    if case == "equal_stripes":
        ims, (n, z) = STRIPES, _simulate_msa(rng, 0.8, 0.45, STRIPES, 20)
    else:
        ims = np.array([0.2, 0.3, 0.3, 0.5, 0.8, 0.8, 1.3, 2.1])
        n, z = _simulate_msa(rng, 0.6, 0.6, ims, np.array([7, 15, 9, 30, 11, 40, 5, 12]))
    fit = fit_msa(ims, n, z)
    model = GLM(np.column_stack([z, n - z]), np.column_stack([np.ones_like(ims), np.log(ims)]),
                family=families.Binomial(link=families.links.Probit()))
    res = model.fit(tol=1e-14, maxiter=200)
    b0, b1 = res.params
    assert_allclose(fit.median, math.exp(-b0 / b1), rtol=1e-5)
    assert_allclose(fit.beta, 1.0 / b1, rtol=1e-5)
    # standard errors: inverse observed information (statsmodels' observed Hessian), carried to (ln median, beta)
    hess = model.hessian(res.params, scale=1.0, observed=True)
    jac = _ab_to_median_beta_jacobian(b0, b1)
    assert_allclose(fit.covariance, jac @ np.linalg.inv(-hess) @ jac.T, rtol=1e-5)
    assert_allclose(fit.log_likelihood, res.llf, rtol=1e-9)  # both include the binomial coefficients
    assert_allclose(fit.median_se, fit.median * fit.ln_median_se, rtol=1e-14)  # delta method


def test_msa_recovers_known_parameters_from_large_simulation():
    # Consistency of the maximum-likelihood estimate: 10 stripes x 2000 analyses, seeded.
    rng = np.random.default_rng(7)
    n, z = _simulate_msa(rng, 0.9, 0.5, STRIPES, 2000)
    fit = fit_msa(STRIPES, n, z)
    assert abs(math.log(fit.median) - math.log(0.9)) < 4 * fit.ln_median_se
    assert abs(fit.beta - 0.5) < 4 * fit.beta_se
    assert fit.ln_median_se < 0.01 and fit.beta_se < 0.01


def test_msa_standard_errors_match_the_spread_over_repeated_simulations():
    # Asymptotic theory: the inverse observed information approximates the sampling covariance.
    rng = np.random.default_rng(11)
    fits = [fit_msa(STRIPES, *_simulate_msa(rng, 0.8, 0.45, STRIPES, 40)) for _ in range(300)]
    ln_med = np.log([f.median for f in fits])
    betas = np.array([f.beta for f in fits])
    # tolerance: Monte Carlo error of 300 repetitions (about 4 %) plus the small-sample error of the asymptotic
    # standard errors (largest relative difference over seeds 0-19 of this set-up: 11 %)
    assert_allclose(np.std(ln_med), np.mean([f.ln_median_se for f in fits]), rtol=0.15)
    assert_allclose(np.std(betas), np.mean([f.beta_se for f in fits]), rtol=0.15)
    assert abs(np.mean(ln_med) - math.log(0.8)) < 4 * np.std(ln_med) / math.sqrt(len(fits))


def test_msa_is_stable_far_in_the_tails():
    # Stripes 8 beta away from the median must not underflow: ln Phi is evaluated in logs.
    ims = np.array([0.01, 0.5, 0.8, 1.2, 60.0])
    fit = fit_msa(ims, [50, 50, 50, 50, 50], [0, 12, 26, 37, 50])
    assert np.isfinite(fit.log_likelihood) and 0.5 < fit.median < 1.2 and np.all(np.isfinite(fit.covariance))


def test_pearson_chi_square_equals_scipy_over_both_outcome_cells():
    # Pearson (1900) over 2m cells (exceed / not exceed per stripe) with m + 1 fitted or constrained
    # quantities removed, i.e. m - 2 degrees of freedom: scipy.stats.chisquare with ddof = m + 1.
    rng = np.random.default_rng(3)
    n, z = _simulate_msa(rng, 0.8, 0.45, STRIPES, 25)
    fit = fit_msa(STRIPES, n, z)
    p = stats.norm.cdf(np.log(STRIPES / fit.median) / fit.beta)
    ref = stats.chisquare(np.concatenate([z, n - z]), np.concatenate([n * p, n * (1 - p)]), ddof=STRIPES.size + 1)
    assert fit.gof.test == "pearson_chi2" and fit.gof.df == STRIPES.size - 2
    assert_allclose(fit.gof.statistic, ref.statistic, rtol=1e-10)
    assert_allclose(fit.gof.p_value, ref.pvalue, rtol=1e-8)
    assert "\n" not in fit.gof.line() and fit.gof.line().startswith("goodness of fit: Pearson chi-square")


@pytest.mark.parametrize("n_exceed, match", [
    ([0, 0, 0, 0], "no analysis reached the damage state"),
    ([10, 10, 10, 10], "every analysis reached the damage state"),
    ([0, 0, 10, 10], "outcomes do not overlap"),
    ([0, 4, 10, 10], r"outcomes do not overlap \(1 stripe"),
    ([9, 6, 3, 1], "decreases with IM"),
])
def test_msa_degenerate_data_is_refused(n_exceed, match):
    # Without overlapping outcomes the likelihood grows without bound as beta -> 0 (separation).
    with pytest.raises(ValueError, match=match):
        fit_msa([0.2, 0.4, 0.6, 0.8], [10, 10, 10, 10], n_exceed)


def test_msa_two_mixed_stripes_suffice():
    fit = fit_msa([0.2, 0.4, 0.6, 0.8], [10, 10, 10, 10], [0, 3, 8, 10])
    assert 0.4 < fit.median < 0.6 and fit.gof.p_value is not None


@pytest.mark.parametrize("kwargs, match", [
    (dict(im=[0.2, -0.4], n_records=[5, 5], n_exceed=[1, 2]), "im must be positive"),
    (dict(im=[0.2, 0.4], n_records=[5, 5], n_exceed=[1, 6]), "exceeds n_records"),
    (dict(im=[0.2, 0.4], n_records=[5, 5.5], n_exceed=[1, 2]), "non-negative integers"),
    (dict(im=[0.2, 0.4], n_records=[5, 5, 5], n_exceed=[1, 2]), "same length"),
])
def test_msa_bad_arguments(kwargs, match):
    with pytest.raises(ValueError, match=match):
        fit_msa(**kwargs)


# ---------------------------------------------------------------------------------------------
# complete IDA: moments of ln IM (Baker 2015, Eq. 2-3)
# ---------------------------------------------------------------------------------------------
def test_ida_moments_are_mean_and_sample_std_of_ln_im():
    # Eq. 2-3: ln median = mean of ln IM; beta = standard deviation of ln IM with ddof = 1 (1/(n-1)).
    x = np.array([0.61, 0.93, 1.12, 0.48, 1.57, 0.88, 0.72, 1.30])
    fit = fit_ida(x)
    assert_allclose(math.log(fit.median), np.mean(np.log(x)), rtol=1e-14)
    assert_allclose(fit.beta, np.std(np.log(x), ddof=1), rtol=1e-14)
    # standard errors: beta/sqrt(n) for ln median; normal approximation to chi-square for beta
    assert_allclose(fit.ln_median_se, fit.beta / math.sqrt(8), rtol=1e-14)
    assert_allclose(fit.beta_se, fit.beta / math.sqrt(2 * 7), rtol=1e-14)
    assert fit.n == fit.n_failed == 8 and fit.method == "ida"


def test_ida_goodness_of_fit_is_scipy_kolmogorov_smirnov():
    x = stats.lognorm(s=0.4, scale=0.9).rvs(size=40, random_state=np.random.default_rng(5))
    fit = fit_ida(x)
    ref = stats.kstest(x, stats.lognorm(s=fit.beta, scale=fit.median).cdf)
    assert_allclose([fit.gof.statistic, fit.gof.p_value], [ref.statistic, ref.pvalue], rtol=1e-12)


def test_ida_recovery_and_standard_errors_over_repeated_simulations():
    rng = np.random.default_rng(17)
    big = fit_ida(np.exp(rng.normal(math.log(1.1), 0.35, 20000)))
    assert abs(math.log(big.median) - math.log(1.1)) < 4 * big.ln_median_se
    assert abs(big.beta - 0.35) < 4 * big.beta_se
    fits = [fit_ida(np.exp(rng.normal(math.log(1.1), 0.35, 30))) for _ in range(300)]
    assert_allclose(np.std(np.log([f.median for f in fits])), np.mean([f.ln_median_se for f in fits]), rtol=0.1)
    assert_allclose(np.std([f.beta for f in fits]), np.mean([f.beta_se for f in fits]), rtol=0.15)


@pytest.mark.parametrize("x, match", [([0.5], "at least 2 records"), ([0.5, 0.5, 0.5], "same IM"),
                                      ([0.5, -1.0], "must be positive"), ([0.5, np.nan], "must be finite")])
def test_ida_degenerate_data_is_refused(x, match):
    with pytest.raises(ValueError, match=match):
        fit_ida(x)


# ---------------------------------------------------------------------------------------------
# truncated IDA: censored likelihood (Baker 2015, Eq. 13-14)
# ---------------------------------------------------------------------------------------------
def _censored_loglik(params, x, cap):
    # Independent writing of the censored likelihood with scipy.stats: density of the failures,
    # survival probability at the largest IM run for the records that did not fail.
    ln_median, beta = params
    if beta <= 0:
        return -np.inf
    dist = stats.lognorm(s=beta, scale=math.exp(ln_median))
    failed = ~np.isnan(x)
    return np.sum(dist.logpdf(x[failed])) + np.sum(dist.logsf(cap[~failed]))


def _simulate_truncated(rng, median, beta, n, im_max):
    capacity = np.exp(rng.normal(math.log(median), beta, n))
    return np.where(capacity <= im_max, capacity, np.nan)


def test_truncated_ida_maximises_the_censored_likelihood():
    rng = np.random.default_rng(23)
    cap = np.where(np.arange(60) % 3 == 0, 1.0, 1.4)  # two different largest IM runs
    x = _simulate_truncated(rng, 1.0, 0.5, 60, cap)
    x[x > cap] = np.nan
    fit = fit_ida_truncated(x, cap)
    ref = optimize.minimize(lambda p: -_censored_loglik(p, x, cap), [0.0, 0.4], method="Nelder-Mead",
                            options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000})
    assert_allclose([math.log(fit.median), fit.beta], ref.x, rtol=1e-6, atol=1e-8)
    assert_allclose(fit.log_likelihood, _censored_loglik(ref.x, x, cap), rtol=1e-10)
    # observed information: central differences of the independent log-likelihood in (ln median, beta)
    t, h = np.array([math.log(fit.median), fit.beta]), 1e-4
    hess = np.empty((2, 2))
    for i in range(2):
        for j in range(2):
            e_i, e_j = np.eye(2)[i] * h, np.eye(2)[j] * h
            hess[i, j] = (_censored_loglik(t + e_i + e_j, x, cap) - _censored_loglik(t + e_i - e_j, x, cap)
                          - _censored_loglik(t - e_i + e_j, x, cap) + _censored_loglik(t - e_i - e_j, x, cap)) / (
                4 * h * h)
    assert_allclose(fit.covariance, np.linalg.inv(-hess), rtol=1e-4)


def test_truncated_ida_without_censoring_is_the_normal_mle():
    # With every record failed the censored likelihood is the normal likelihood of ln IM: mean and ddof=0 std.
    x = np.array([0.61, 0.93, 1.12, 0.48, 1.57, 0.88, 0.72, 1.30])
    fit = fit_ida_truncated(x, 2.0)
    assert_allclose([math.log(fit.median), fit.beta], [np.mean(np.log(x)), np.std(np.log(x))], rtol=1e-10)
    # and the Kaplan-Meier distance reduces to the Kolmogorov-Smirnov statistic
    ks = stats.kstest(x, stats.lognorm(s=fit.beta, scale=fit.median).cdf).statistic
    assert_allclose(fit.gof.statistic, ks, rtol=1e-10)
    assert fit.gof.p_value is None


def test_truncated_ida_recovery_and_standard_errors_over_repeated_simulations():
    rng = np.random.default_rng(29)
    big = fit_ida_truncated(_simulate_truncated(rng, 0.9, 0.45, 20000, 1.1), 1.1)
    assert 0.25 < 1 - big.n_failed / big.n < 0.4  # about a third censored
    assert abs(math.log(big.median) - math.log(0.9)) < 4 * big.ln_median_se
    assert abs(big.beta - 0.45) < 4 * big.beta_se
    fits = [fit_ida_truncated(_simulate_truncated(rng, 0.9, 0.45, 60, 1.1), 1.1) for _ in range(400)]
    assert_allclose(np.std(np.log([f.median for f in fits])), np.mean([f.ln_median_se for f in fits]), rtol=0.15)
    assert_allclose(np.std([f.beta for f in fits]), np.mean([f.beta_se for f in fits]), rtol=0.2)


@pytest.mark.parametrize("x, cap, match", [
    ([np.nan, np.nan, 0.5], 1.0, "2 or more distinct IMs"),
    ([0.5, 0.5, np.nan], 1.0, "2 or more distinct IMs"),
    ([0.5, 0.7, 1.2], 1.0, "above its largest IM run"),
    ([0.5, 0.7, np.nan], -1.0, "im_max must be positive"),
])
def test_truncated_ida_degenerate_data_is_refused(x, cap, match):
    with pytest.raises(ValueError, match=match):
        fit_ida_truncated(x, cap)


# ---------------------------------------------------------------------------------------------
# extra dispersion: square root of sum of squares (FEMA P-695, 2009, Eq. 7-5, from memory)
# ---------------------------------------------------------------------------------------------
def test_extra_dispersion_combines_by_square_root_of_sum_of_squares():
    assert combine_dispersion(0.4, 0.3) == pytest.approx(0.5, rel=1e-15)  # 3-4-5 triangle
    assert combine_dispersion(0.4, 0.3, 1.2) == pytest.approx(1.3, rel=1e-15)
    fit = fit_ida([0.61, 0.93, 1.12, 0.48, 1.57], beta_extra=0.25)
    assert fit.beta_total == pytest.approx(math.hypot(fit.beta, 0.25), rel=1e-15)
    assert fit_ida([0.61, 0.93, 1.12]).beta_total == fit_ida([0.61, 0.93, 1.12]).beta
    with pytest.raises(ValueError, match="non-negative"):
        fit_ida([0.61, 0.93], beta_extra=-0.1)


def test_fitting_module_imports_only_core():
    # DESIGN.md section 2 layering, and the brief for this module: numerics on quakefolio.core only, no pandas.
    tree = ast.parse((REPO / "fragility" / "fitting.py").read_text())
    names = {a.name for n in ast.walk(tree) if isinstance(n, ast.Import) for a in n.names}
    names |= {n.module for n in ast.walk(tree) if isinstance(n, ast.ImportFrom) and n.module}
    assert not {m for m in names if m.startswith("quakefolio.") and not m.startswith("quakefolio.core")}
    assert not {m for m in names if m.split(".")[0] in ("pandas", "pyarrow", "prefect")}


# ---------------------------------------------------------------------------------------------
# library documents
# ---------------------------------------------------------------------------------------------
def _demo_library_data():
    return tomllib.loads(DEMO_LIBRARY.read_text())


def test_library_round_trip_through_the_serializer():
    data = _demo_library_data()
    text = library_to_toml(data, header="# header kept")
    assert tomllib.loads(text) == data and text.startswith("# header kept\n")
    parse_library(tomllib.loads(text), text=text)
    odd = {"format": "quakefolio-fragility-1", "classes": {"A.B": {"im": "PGA", "description": 'say "hi"\\\n',
                                                                  "states": [{"name": "x", "median": 1e-05,
                                                                              "beta": 0.5, "mean_damage_ratio": 0}]}}}
    assert tomllib.loads(library_to_toml(odd)) == odd


def test_set_damage_state_inserts_by_median_and_refuses_crossings():
    data = _demo_library_data()
    # RCF-LO: repairable 0.52 g / 0.62, irreparable 1.05 g / 0.65 (demo library)
    new, notes = set_damage_state(data, "RCF-LO", "moderate", 0.75, 0.61, mean_damage_ratio=0.3)
    names = [s["name"] for s in new["classes"]["RCF-LO"]["states"]]
    assert names == ["cosmetic", "repairable", "moderate", "irreparable", "collapse"]
    assert data == _demo_library_data()  # the input mapping is not modified
    with pytest.raises(ValueError, match=r"cross at .* exceeds P\(repairable\)|P\(moderate\) exceeds"):
        set_damage_state(data, "RCF-LO", "moderate", 0.75, 0.42, mean_damage_ratio=0.3)
    with pytest.raises(ValueError, match="mean damage ratios must not decrease"):
        set_damage_state(data, "RCF-LO", "moderate", 0.75, 0.61, mean_damage_ratio=0.9)
    with pytest.raises(ValueError, match="medians must increase"):
        set_damage_state(data, "RCF-LO", "irreparable", 2.5, 0.65)  # replaced in place, past 'collapse'
    with pytest.raises(ValueError, match="give its IM"):
        set_damage_state(data, "NEW-1", "collapse", 1.0, 0.5, mean_damage_ratio=1.0)
    with pytest.raises(ValueError, match="uses SA_0.3, not SA_1.0"):
        set_damage_state(data, "RCF-LO", "moderate", 0.75, 0.61, mean_damage_ratio=0.3, im="SA_1.0")


def test_crossing_rule_bounds_the_out_of_order_probability():
    # Where two lognormal curves cross at probability p*, the out-of-order difference beyond the
    # crossing is below p* (low side) or 1 - p* (high side); checked here on a fine grid.
    lo, hi = (0.52, 0.62), (0.75, 0.42)
    x = np.geomspace(1e-3, 1e3, 200001)
    worst = np.max(stats.lognorm(s=hi[1], scale=hi[0]).cdf(x) - stats.lognorm(s=lo[1], scale=lo[0]).cdf(x))
    xs = float(lognormal_crossing_im(lo[0], lo[1], hi[0], hi[1]))
    p_star = stats.lognorm(s=lo[1], scale=lo[0]).cdf(xs)
    assert 0 < worst <= 1 - p_star and worst > CROSSING_TOLERANCE


# ---------------------------------------------------------------------------------------------
# the fit-fragility command
# ---------------------------------------------------------------------------------------------
def _run(argv, capsys):
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_json_matches_the_library_function(capsys):
    code, out, err = _run(["fit-fragility", str(EXAMPLE_MSA), "--json", "--extra-beta", "0.3"], capsys)
    assert code == 0 and CAUTION not in out and err.strip() == CAUTION
    got = json.loads(out)
    data = np.genfromtxt(EXAMPLE_MSA, delimiter=",", names=True)
    ref = fit_msa(data["im"], data["n_records"], data["n_exceed"], beta_extra=0.3)
    assert set(got) == {"method", "median", "beta", "median_se", "beta_se", "beta_total", "n", "gof"}
    assert got["method"] == "msa" and got["n"] == 320
    for key in ("median", "beta", "median_se", "beta_se", "beta_total"):
        assert got[key] == pytest.approx(getattr(ref, key), rel=1e-15)
    assert got["gof"]["test"] == "pearson_chi2" and got["gof"]["df"] == 6
    assert 0.6 < got["median"] < 0.9  # the invented example sits near 0.75 g


def test_cli_text_output_opens_with_the_caution(capsys):
    code, out, _ = _run(["fit-fragility", str(EXAMPLE_MSA)], capsys)
    lines = out.splitlines()
    assert code == 0 and lines[0] == CAUTION
    assert any(ln.strip().startswith("median") and "standard error" in ln for ln in lines)
    assert any(ln.strip().startswith("beta") and "standard error" in ln for ln in lines)
    assert sum("goodness of fit" in ln for ln in lines) == 1


def test_cli_ida_kinds_are_told_by_the_columns(tmp_path, capsys):
    complete = tmp_path / "ida.csv"
    complete.write_text("record_id,im_at_failure\nr1,0.61\nr2,0.93\nr3,1.12\nr4,0.48\nr5,1.57\n")
    code, out, _ = _run(["fit-fragility", str(complete), "--json"], capsys)
    assert code == 0 and json.loads(out)["method"] == "ida"
    assert json.loads(out)["beta"] == pytest.approx(fit_ida([0.61, 0.93, 1.12, 0.48, 1.57]).beta, rel=1e-15)
    truncated = tmp_path / "tida.csv"
    truncated.write_text("record_id,im_at_failure\nr1,0.61\nr2,\nr3,1.12\nr4,0.48\nr5,NaN\nr6,0.9\n")
    code, out, _ = _run(["fit-fragility", str(truncated), "--json", "--im-max", "1.5"], capsys)
    ref = fit_ida_truncated([0.61, np.nan, 1.12, 0.48, np.nan, 0.9], 1.5)
    assert code == 0 and json.loads(out)["method"] == "ida-truncated"
    assert json.loads(out)["median"] == pytest.approx(ref.median, rel=1e-15)
    per_record = tmp_path / "tida_cap.csv"
    per_record.write_text("im_at_failure,im_max\n0.61,1.5\n,1.5\n1.12,\n0.48,1.5\n,1.5\n0.9,1.5\n")
    code, out, _ = _run(["fit-fragility", str(per_record), "--json"], capsys)
    assert code == 0 and json.loads(out)["median"] == pytest.approx(ref.median, rel=1e-12)


def test_cli_reads_parquet_like_csv(tmp_path, capsys):
    import pandas as pd

    pq = tmp_path / "msa.parquet"
    pd.read_csv(EXAMPLE_MSA).to_parquet(pq)
    _, from_csv, _ = _run(["fit-fragility", str(EXAMPLE_MSA), "--json"], capsys)
    code, from_pq, _ = _run(["fit-fragility", str(pq), "--json"], capsys)
    assert code == 0 and json.loads(from_pq) == json.loads(from_csv)


BAD_FILES = {  # name: (file text, extra arguments, expected location and message)
    "not_a_number": ("im,n_records,n_exceed\n0.2,10,0\nabc,10,3\n0.6,10,8\n", [],
                     ":3: column 'im': expected a number, got 'abc'"),
    "negative_im": ("im,n_records,n_exceed\n0.2,10,0\n-0.4,10,3\n0.6,10,8\n", [],
                    ":3: column 'im': expected a positive number"),
    "too_many_exceed": ("im,n_records,n_exceed\n0.2,10,0\n0.4,10,3\n0.6,10,12\n", [],
                        ":4: column 'n_exceed': n_exceed (12) is larger than n_records (10)"),
    "fractional_count": ("im,n_records,n_exceed\n0.2,10,0\n0.4,10.5,3\n0.6,10,8\n", [],
                         ":3: column 'n_records': expected an integer"),
    "negative_count": ("im,n_records,n_exceed\n0.2,10,-1\n0.4,10,3\n0.6,10,8\n", [],
                       ":2: column 'n_exceed': expected a non-negative number"),
    "missing_count": ("im,n_records,n_exceed\n0.2,10,0\n0.4,,3\n0.6,10,8\n", [],
                      ":3: column 'n_records': missing value"),
    "empty": ("", [], ": file is empty"),
    "header_only": ("im,n_records,n_exceed\n", [], ":2: no data rows"),
    "missing_column": ("im,n_records\n0.2,10\n", [], ":1: column 'n_exceed': missing required column"),
    "misspelt_column": ("im,n_records,n_exceeds\n0.2,10,0\n", [], ":1: column 'n_exceeds': unknown column"),
    "unknown_kind": ("x,y\n1,2\n", [], ":1: cannot tell the kind of results"),
    "both_kinds": ("im,n_records,n_exceed,im_at_failure\n0.2,10,0,0.5\n", [],
                   ":1: column 'im_at_failure': holds both"),
    "all_zero": ("im,n_records,n_exceed\n0.2,10,0\n0.4,10,0\n", [],
                 ": column 'n_exceed': multiple-stripe fit: no analysis reached the damage state"),
    "no_im_max": ("record_id,im_at_failure\nr1,0.5\nr2,\nr3,0.7\n", [],
                  ":1: column 'im_at_failure': truncated IDA needs the largest IM run"),
    "failure_above_im_max": ("record_id,im_at_failure\nr1,0.5\nr2,\nr3,1.7\n", ["--im-max", "1.5"],
                             ":4: column 'im_at_failure': failure at 1.7 g lies above the largest IM run 1.5 g"),
    "standing_without_cap": ("im_at_failure,im_max\n0.5,1.5\n,\n0.7,1.5\n", [],
                             ":3: column 'im_max': missing value"),
    "forced_complete_ida": ("record_id,im_at_failure\nr1,0.5\nr2,\nr3,0.7\n", ["--method", "ida"],
                            ":3: column 'im_at_failure': missing value: a record that did not fail"),
}


@pytest.mark.parametrize("name", sorted(BAD_FILES))
def test_cli_bad_files_exit_2_with_one_line_naming_file_row_column(name, tmp_path, capsys):
    text, extra, expected = BAD_FILES[name]
    path = tmp_path / f"{name}.csv"
    path.write_text(text)
    code, out, err = _run(["fit-fragility", str(path), *extra], capsys)
    assert code == 2 and out == ""
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert err.startswith(f"error: {path}{expected}"), err


def _copy_library(tmp_path):
    lib = tmp_path / "library.toml"
    shutil.copyfile(DEMO_LIBRARY, lib)
    return lib


def test_cli_write_library_adds_a_state_that_loads(tmp_path, capsys):
    lib = _copy_library(tmp_path)
    code, out, _ = _run(["fit-fragility", str(EXAMPLE_MSA), "--extra-beta", "0.45", "--write-library", str(lib),
                         "--class", "RCF-LO", "--state", "moderate", "--mean-damage-ratio", "0.3", "--cov", "0.5"],
                        capsys)
    assert code == 0 and "wrote" in out
    fit = fit_msa(*np.genfromtxt(EXAMPLE_MSA, delimiter=",", skip_header=1).T, beta_extra=0.45)
    dss = load_library(lib)["RCF-LO"]
    assert dss.names == ("cosmetic", "repairable", "moderate", "irreparable", "collapse")
    j = dss.names.index("moderate")
    assert dss.medians[j] == pytest.approx(fit.median, rel=1e-3) and dss.betas[j] == pytest.approx(fit.beta_total,
                                                                                                   rel=1e-3)
    assert dss.mean_damage_ratio[j] == 0.3 and dss.cov[j] == 0.5
    assert len(load_library(lib)) == len(load_library(DEMO_LIBRARY))
    text = lib.read_text()
    assert text.startswith(DEMO_LIBRARY.read_text().splitlines()[0]) and "# fit-fragility: classes.RCF-LO" in text
    assert sorted(p.name for p in tmp_path.iterdir()) == ["library.toml"]  # no temporary file left


def test_cli_write_library_replaces_a_state_and_keeps_its_consequences(tmp_path, capsys):
    lib = _copy_library(tmp_path)
    before = load_library(lib)["RCF-LO"]
    code, out, err = _run(["fit-fragility", str(EXAMPLE_MSA), "--json", "--extra-beta", "0.45", "--write-library",
                           str(lib), "--class", "RCF-LO", "--state", "irreparable"], capsys)
    assert code == 0 and json.loads(out)["method"] == "msa" and "wrote" in err  # stdout stays one JSON object
    after = load_library(lib)["RCF-LO"]
    assert after.names == before.names and after.medians[2] != before.medians[2]
    assert after.mean_damage_ratio[2] == before.mean_damage_ratio[2] and after.cov[2] == before.cov[2]
    assert after.downtime_days[2] == before.downtime_days[2]


def test_cli_write_library_keeps_the_file_mode(tmp_path, capsys):
    lib = _copy_library(tmp_path)
    lib.chmod(0o640)
    code, _, _ = _run(["fit-fragility", str(EXAMPLE_MSA), "--extra-beta", "0.45", "--write-library", str(lib),
                       "--class", "RCF-LO", "--state", "irreparable"], capsys)
    assert code == 0 and lib.read_bytes() != DEMO_LIBRARY.read_bytes()
    assert stat.S_IMODE(lib.stat().st_mode) == 0o640
    assert sorted(p.name for p in tmp_path.iterdir()) == ["library.toml"]


def test_cli_write_library_creates_class_and_file(tmp_path, capsys):
    lib = tmp_path / "new_library.toml"
    args = ["fit-fragility", str(EXAMPLE_MSA), "--write-library", str(lib), "--class", "FITTED",
            "--state", "collapse", "--mean-damage-ratio", "1.0"]
    code, _, err = _run(args, capsys)
    assert code == 2 and "give its IM (--im)" in err and not lib.exists()
    code, _, _ = _run(args + ["--im", "SA_1.0"], capsys)
    assert code == 0 and load_library(lib)["FITTED"].im == "SA_1.0"


@pytest.mark.parametrize("extra, match", [
    (["--mean-damage-ratio", "0.3"], "cross at"),  # beta 0.42 next to repairable's 0.62 (demo library)
    (["--extra-beta", "0.45", "--mean-damage-ratio", "0.9"], "mean damage ratios must not decrease"),
    (["--extra-beta", "0.45"], "give its mean damage ratio"),
])
def test_cli_write_library_refusals_leave_the_file_untouched(extra, match, tmp_path, capsys):
    lib = _copy_library(tmp_path)
    argv = ["fit-fragility", str(EXAMPLE_MSA), "--write-library", str(lib), "--class", "RCF-LO", "--state",
            "moderate", *extra]
    code, _, err = _run(argv, capsys)
    assert code == 2 and match in err and len(err.strip().splitlines()) == 1
    assert err.startswith(f"error: {lib}: column 'classes.RCF-LO':")
    assert lib.read_bytes() == DEMO_LIBRARY.read_bytes()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["library.toml"]


def test_cli_library_options_need_write_library(capsys):
    code, _, err = _run(["fit-fragility", str(EXAMPLE_MSA), "--class", "RCF-LO"], capsys)
    assert code == 2 and "only apply with --write-library" in err
    code, _, err = _run(["fit-fragility", str(EXAMPLE_MSA), "--write-library", "x.toml"], capsys)
    assert code == 2 and "needs --class and --state" in err


def test_module_help_and_no_prefect_import():
    # `python -m quakefolio.pipeline fit-fragility --help` works; the command never imports prefect.
    res = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "fit-fragility", "--help"],
                         capture_output=True, text=True, timeout=60)
    assert res.returncode == 0 and "--write-library" in res.stdout and "DATA" in res.stdout
    code = ("import sys; from quakefolio.pipeline.cli import main; rc = main(['fit-fragility', sys.argv[1], "
            "'--json']); assert 'prefect' not in sys.modules, 'prefect imported'; sys.exit(rc)")
    res = subprocess.run([sys.executable, "-c", code, str(EXAMPLE_MSA)], capture_output=True, text=True, timeout=60)
    assert res.returncode == 0, res.stderr
    assert json.loads(res.stdout)["method"] == "msa"
