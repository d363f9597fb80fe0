"""Event sets and correlated ground-motion fields (core.eventset, core.gmf).

Sampling checks use fixed seeds and tolerances of about 4 standard errors of the
estimate, so a correct sampler fails with probability well below 1e-3 per check and a
wrong correlation model (wrong range, wrong cross-IM equation) fails clearly.
"""
import math

import numpy as np
import pytest
import scipy.stats as st
from numpy.testing import assert_allclose, assert_array_equal

from quakefolio.core.events.eventset import (
    EVENT_BLOCK_SIZE,
    STREAM_DAMAGE,
    EventSet,
    block_rng,
    event_blocks,
    stochastic_event_set,
)
from quakefolio.core.events.gmf import (
    FieldSampler,
    bj08_correlation,
    cross_im_correlation_matrix,
    jb09_correlation,
    jb09_range_km,
    ln_im,
    truncated_normal_transform,
)
from quakefolio.core.hazard import exceedance_probability

EARTH_RADIUS_KM = 6371.0


def great_circle_km(lon, lat):
    """Haversine distances [km] between all pairs (independent of the sampler's projection)."""
    lo, la = np.radians(lon), np.radians(lat)
    dlo = lo[:, None] - lo[None, :]
    dla = la[:, None] - la[None, :]
    a = np.sin(dla / 2) ** 2 + np.cos(la[:, None]) * np.cos(la[None, :]) * np.sin(dlo / 2) ** 2
    return 2 * EARTH_RADIUS_KM * np.arcsin(np.sqrt(np.clip(a, 0, 1)))


def random_sites(n, seed, lon0=10.0, lat0=45.0, size_deg=0.3):
    rng = np.random.default_rng(seed)
    return lon0 + size_deg * rng.random(n), lat0 + size_deg * rng.random(n)


# --------------------------------------------------------------------------- #
# Event set
# --------------------------------------------------------------------------- #
def test_event_counts_are_poisson_per_rupture_and_per_year():
    # Poisson process (e.g. Ross 2014, ch. 5): over N years K_r ~ Poisson(rate N); in each
    # year the count is Poisson(rate), so its mean and variance both equal the rate.
    # Standard errors: mean sqrt(rate / N); sample variance sqrt((rate + 2 rate^2) / N)
    # (fourth central moment of a Poisson variable: rate + 3 rate^2).
    rates = np.array([0.8, 0.1, 0.01, 0.0])
    n_years = 100_000
    es = stochastic_event_set(rates, n_years, seed=11)
    for r, rate in enumerate(rates):
        years = es.year[es.rupture == r]
        total = years.size
        assert abs(total - rate * n_years) <= 4 * math.sqrt(rate * n_years)
        per_year = np.bincount(years, minlength=n_years + 1)[1:]
        assert abs(per_year.mean() - rate) <= 4 * math.sqrt(rate / n_years)
        assert abs(per_year.var(ddof=1) - rate) <= 4 * math.sqrt((rate + 2 * rate**2) / n_years)
    assert not np.any(es.rupture == 3)  # zero rate: never occurs


def test_event_set_layout_and_determinism():
    rates = np.array([0.3, 0.05, 0.2])
    a = stochastic_event_set(rates, 500, seed=7)
    b = stochastic_event_set(rates, 500, seed=7)
    c = stochastic_event_set(rates, 500, seed=8)
    assert isinstance(a, EventSet) and a.n_years == 500 and len(a) == a.event_id.size
    for name in ("event_id", "year", "rupture"):
        assert_array_equal(getattr(a, name), getattr(b, name))  # same seed: identical
    assert not (a.n_events == c.n_events and np.array_equal(a.year, c.year))
    assert a.event_id.dtype == np.int64 and a.year.dtype == np.int32 and a.rupture.dtype == np.int64
    assert_array_equal(a.event_id, np.arange(1, a.n_events + 1))
    assert a.year.min() >= 1 and a.year.max() <= 500
    key = a.year.astype(np.int64) * 10 + a.rupture  # sorted by year, then rupture
    assert np.all(np.diff(key) >= 0)
    with pytest.raises(ValueError):
        a.year[0] = 3  # read-only


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"rupture_rates": [0.1, -0.2], "n_years": 10, "seed": 1}, "finite and >= 0"),
        ({"rupture_rates": [0.1, np.nan], "n_years": 10, "seed": 1}, "finite and >= 0"),
        ({"rupture_rates": [[0.1]], "n_years": 10, "seed": 1}, "1-D"),
        ({"rupture_rates": [0.1], "n_years": 0, "seed": 1}, "n_years"),
        ({"rupture_rates": [0.1], "n_years": 2.5, "seed": 1}, "n_years"),
        ({"rupture_rates": [0.1], "n_years": 10, "seed": -1}, "seed"),
        ({"rupture_rates": [0.1], "n_years": 10, "seed": 1.0}, "seed"),
    ],
)
def test_event_set_rejects_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        stochastic_event_set(**kwargs)


def test_event_blocks_partition_the_events():
    blocks = event_blocks(1000)
    assert blocks.shape == (4, 2) and EVENT_BLOCK_SIZE == 256
    assert_array_equal(blocks[:, 0], [0, 256, 512, 768])
    assert_array_equal(blocks[:, 1], [256, 512, 768, 1000])
    assert event_blocks(0).shape == (0, 2)
    assert_array_equal(event_blocks(512, 256)[:, 1], [256, 512])


def test_block_rng_streams_are_reproducible_and_distinct():
    x = block_rng(5, 3).standard_normal(4)
    assert_array_equal(x, block_rng(5, 3).standard_normal(4))
    assert not np.array_equal(x, block_rng(5, 4).standard_normal(4))
    assert not np.array_equal(x, block_rng(6, 3).standard_normal(4))
    assert not np.array_equal(x, block_rng(5, 3, stream=STREAM_DAMAGE).standard_normal(4))
    with pytest.raises(ValueError, match="block_index"):
        block_rng(5, -1)


def test_fields_do_not_depend_on_how_blocks_are_grouped():
    # Reproducibility contract (core.eventset notes): any grouping of whole blocks into
    # tasks gives identical residuals, bitwise.
    lon, lat = random_sites(60, seed=2)
    fs = FieldSampler(lon, lat, ["PGA", "SA_0.3", "SA_1.0"])
    n_events = 3 * EVENT_BLOCK_SIZE + 41  # last block partial
    whole = fs.sample_event_blocks(99, n_events, [0, 1, 2, 3])
    assert whole.eta.shape == (n_events, 3) and whole.eps.shape == (n_events, 3, 60)
    for grouping in ([[0], [1], [2], [3]], [[0, 1], [2, 3]], [[0], [1, 2, 3]], [[0, 1, 2], [3]]):
        parts = [fs.sample_event_blocks(99, n_events, g) for g in grouping]
        assert_array_equal(np.concatenate([p.eta for p in parts]), whole.eta)
        assert_array_equal(np.concatenate([p.eps for p in parts]), whole.eps)
    # a block's draws are those of sample() with that block's generator
    one = fs.sample(block_rng(99, 2), EVENT_BLOCK_SIZE)
    assert_array_equal(one.eps, whole.eps[512:768])
    with pytest.raises(ValueError, match="strictly increasing"):
        fs.sample_event_blocks(99, n_events, [1, 0])


# --------------------------------------------------------------------------- #
# Correlation models
# --------------------------------------------------------------------------- #
def test_jb09_ranges():
    # Jayaram & Baker (2009), range model: case 1 b = 8.5 + 17.2 T, case 2 b = 40.7 - 15.0 T
    # for T < 1 s; b = 22.0 + 3.7 T for T >= 1 s; PGA as T = 0.
    t = np.array([0.0, 0.5, 1.0, 2.0])
    assert_allclose(jb09_range_km(t), [8.5, 17.1, 25.7, 29.4], rtol=1e-12)
    assert_allclose(jb09_range_km(t, vs30_clustering=True), [40.7, 33.2, 25.7, 29.4], rtol=1e-12)
    # rho(h = b) = exp(-3)
    assert_allclose(jb09_correlation(8.5, 0.0), math.exp(-3.0), rtol=1e-12)
    with pytest.raises(ValueError, match="period_s"):
        jb09_range_km(-0.1)


def test_bj08_reference_values():
    # Baker & Jayaram (2008), predictive equation, evaluated by hand:
    # (0.3, 0.01): Tmax >= 0.2, Tmin < 0.109 -> C4. C1 = 1 - cos(pi/2 - 0.366 ln(0.3/0.109))
    #   = 0.637650; C3 = C1; C4 = C1 + 0.5 (sqrt(C1) - C1)(1 + cos(pi 0.01/0.109)) = 0.795352.
    # (1.0, 0.5): Tmin > 0.109 -> C1 = 1 - cos(pi/2 - 0.366 ln 2) = 0.749021.
    # (0.1, 0.05): Tmax < 0.109 -> C2 = 1 - 0.105 (1 - 1/(1 + e^5)) (0.05/0.0901) = 0.942121.
    # (2.0, 2.0): 1.
    got = bj08_correlation([0.3, 1.0, 0.1, 2.0], [0.01, 0.5, 0.05, 2.0])
    assert_allclose(got, [0.795352, 0.749021, 0.942121, 1.0], atol=2e-6)
    assert_allclose(bj08_correlation(0.5, 1.0), bj08_correlation(1.0, 0.5), rtol=0)  # symmetric
    r = cross_im_correlation_matrix(["PGA", "SA_0.2", "SA_1.0", "SA_3.0"])
    assert_allclose(np.diag(r), 1.0) and np.all(np.linalg.eigvalsh(r) > 0)
    assert_allclose(r[0, 2], bj08_correlation(0.01, 1.0))  # PGA as T = 0.01 s (common practice)
    with pytest.raises(ValueError, match="0.01, 10"):
        bj08_correlation(20.0, 1.0)


# --------------------------------------------------------------------------- #
# Sampled correlations
# --------------------------------------------------------------------------- #
def test_sampler_factor_is_the_jb09_matrix_on_the_dense_route():
    # Jayaram & Baker (2009): C_ij = exp(-3 h_ij / b); distances here from the haversine
    # formula, the sampler's from its local projection (agree to << 0.1 % over 30 km).
    lon, lat = random_sites(150, seed=4)
    fs = FieldSampler(lon, lat, ["PGA", "SA_1.0"], vs30_clustering=True)
    assert fs.method == "dense" and fs.rank == 150
    h = great_circle_km(lon, lat)
    for im, t in (("PGA", 0.0), ("SA_1.0", 1.0)):
        assert_allclose(fs.implied_correlation(im), jb09_correlation(h, t, vs30_clustering=True), atol=1e-6)


def test_within_event_correlation_reproduces_jb09():
    # Jayaram & Baker (2009): empirical correlation of simulated eps vs separation, pairs
    # binned by distance, compared with the bin mean of exp(-3h/b). A sample correlation
    # from n fields has standard error <= 1/sqrt(n): tolerance 4/sqrt(n).
    lon, lat = random_sites(70, seed=5, size_deg=0.35)
    ims = ["PGA", "SA_1.0"]
    fs = FieldSampler(lon, lat, ims)
    n = 4000
    eps = fs.sample(np.random.default_rng(21), n).eps
    h = great_circle_km(lon, lat)
    iu = np.triu_indices(70, 1)
    edges = [0, 3, 6, 10, 15, 25, 40]
    for k, im in enumerate(ims):
        emp = np.corrcoef(eps[:, k, :], rowvar=False)[iu]
        model = jb09_correlation(h[iu], 0.0 if im == "PGA" else 1.0)
        bins = np.digitize(h[iu], edges)
        for b in np.unique(bins):
            sel = bins == b
            assert abs(emp[sel].mean() - model[sel].mean()) <= 4 / math.sqrt(n), (im, edges[b - 1])
        assert_allclose(eps[:, k, :].var(axis=0).mean(), 1.0, atol=4 * math.sqrt(2 / n))


def test_cross_im_correlation_reproduces_bj08_at_a_site_and_for_eta():
    # Baker & Jayaram (2008): with spatial correlation off the separable construction is
    # exact at every site; eta across IMs always. Tolerance 4/sqrt(n).
    ims = ["PGA", "SA_0.2", "SA_1.0", "SA_3.0"]
    r = cross_im_correlation_matrix(ims)
    lon, lat = random_sites(3, seed=6)
    n = 20_000
    tol = 4 / math.sqrt(n)
    res = FieldSampler(lon, lat, ims, spatial_correlation=False).sample(np.random.default_rng(3), n)
    assert_allclose(np.corrcoef(res.eta, rowvar=False), r, atol=tol)
    for site in range(3):
        assert_allclose(np.corrcoef(res.eps[:, :, site], rowvar=False), r, atol=tol)
    # same range for every IM: still exact at a site (module notes)
    res = FieldSampler(lon, lat, ims, range_km=20.0).sample(np.random.default_rng(4), n)
    assert_allclose(np.corrcoef(res.eps[:, :, 1], rowvar=False), r, atol=tol)
    # cross-IM off: independent IMs
    res = FieldSampler(lon, lat, ims, cross_im_correlation=False).sample(np.random.default_rng(5), n)
    assert_allclose(np.corrcoef(res.eta, rowvar=False), np.eye(4), atol=tol)
    assert_allclose(np.corrcoef(res.eps[:, :, 0], rowvar=False), np.eye(4), atol=tol)


def test_colocated_cross_im_correlation_with_different_ranges_is_as_documented():
    # Separable approximation (core.gmf notes): Cov(eps_k,i, eps_l,i) = R_kl (L_k L_l^T)_ii,
    # attenuated when ranges differ; the sampler's diagnostic predicts it. Pooled over
    # sites, the sample covariance has standard error <= 1/sqrt(n).
    ims = ["PGA", "SA_1.0"]
    lon, lat = random_sites(40, seed=8)
    fs = FieldSampler(lon, lat, ims)
    mean, lowest = fs.colocated_cross_im_correlation()
    r = fs.cross_im_matrix[0, 1]
    assert lowest[0, 1] <= mean[0, 1] <= r
    n = 10_000
    eps = fs.sample(np.random.default_rng(9), n).eps
    pooled = np.mean(eps[:, 0, :] * eps[:, 1, :])
    assert abs(pooled - mean[0, 1]) <= 4 / math.sqrt(n)


def test_limits_independent_sites_and_infinite_range():
    lon, lat = random_sites(25, seed=10, size_deg=0.05)  # close sites: strongly correlated if on
    n = 5000
    eps = FieldSampler(lon, lat, ["PGA"], spatial_correlation=False).sample(np.random.default_rng(1), n).eps
    emp = np.corrcoef(eps[:, 0, :], rowvar=False)[np.triu_indices(25, 1)]
    assert np.max(np.abs(emp)) <= 5 / math.sqrt(n)  # 300 pairs, each with standard error 1/sqrt(n)
    fs = FieldSampler(lon, lat, ["PGA", "SA_1.0"], range_km=np.inf)
    assert fs.method == "eigen" and fs.rank == 1  # Cholesky of an all-ones matrix fails: exact rank-1 root
    eps = fs.sample(np.random.default_rng(2), 200).eps
    assert_allclose(eps, np.broadcast_to(eps[:, :, :1], eps.shape), rtol=0, atol=1e-12)
    assert_allclose(eps[:, :, 0].std(axis=0), 1.0, atol=4 * math.sqrt(0.5 / 200))


def test_repeated_sites_share_their_field_and_keep_input_order():
    lon, lat = random_sites(6, seed=12)
    lon2, lat2 = np.r_[lon, lon[[4, 1]]], np.r_[lat, lat[[4, 1]]]
    fs = FieldSampler(lon2, lat2, ["SA_0.3"])
    assert fs.n_sites == 8 and fs.n_unique_sites == 6
    assert_array_equal(fs.site_index, [0, 1, 2, 3, 4, 5, 4, 1])
    eps = fs.sample(np.random.default_rng(0), 50).eps
    assert_array_equal(eps[:, :, 6], eps[:, :, 4])
    assert_array_equal(eps[:, :, 7], eps[:, :, 1])
    unique = FieldSampler(lon, lat, ["SA_0.3"]).sample(np.random.default_rng(0), 50).eps
    assert_array_equal(eps[:, :, :6], unique)


def test_eigen_route_keeps_the_variance_share_and_approximates_the_dense_route():
    # Truncated eigen-decomposition (Golub & Van Loan 2013, symmetric eigenproblem) keeping
    # >= 99 % of tr C, rows re-normalised to unit variance.
    lon, lat = random_sites(400, seed=13, size_deg=0.2)
    ims = ["PGA", "SA_1.0"]
    dense = FieldSampler(lon, lat, ims)
    eig = FieldSampler(lon, lat, ims, dense_max_sites=100, eigen_variance_share=0.99)
    assert dense.method == "dense" and eig.method == "eigen"
    assert eig.rank < 400 and np.all(eig.variance_share >= 0.99)
    for im in ims:
        c_eig, c_dense = eig.implied_correlation(im), dense.implied_correlation(im)
        assert_allclose(np.diag(c_eig), 1.0, rtol=1e-12)  # each site keeps unit variance
        diff = np.abs(c_eig - c_dense)
        assert diff.mean() <= 0.005 and diff.max() <= 0.1  # measured: mean 1e-3, max 0.08 (PGA)
    eps = eig.sample(np.random.default_rng(14), 2000).eps
    assert_allclose(eps.var(axis=0).mean(), 1.0, atol=4 * math.sqrt(2 / 2000))


# --------------------------------------------------------------------------- #
# Truncation and ln IM
# --------------------------------------------------------------------------- #
@pytest.mark.parametrize("n_sigma", [1.5, 2.0, 3.0])
def test_truncated_transform_matches_truncnorm(n_sigma):
    # scipy.stats.truncnorm(-n, n) moments; standard errors from its own variance and
    # fourth moment.
    z = np.random.default_rng(15).standard_normal(200_000)
    t = truncated_normal_transform(z, n_sigma)
    assert np.max(np.abs(t)) <= n_sigma
    ref = st.truncnorm(-n_sigma, n_sigma)
    var, m4 = ref.var(), ref.moment(4)
    assert abs(t.mean()) <= 4 * math.sqrt(var / z.size)
    assert abs(t.var() - var) <= 4 * math.sqrt((m4 - var**2) / z.size)
    assert st.kstest(t, ref.cdf).pvalue > 1e-3
    assert np.all(np.diff(t[np.argsort(z)]) >= 0)  # increasing map
    assert_allclose(truncated_normal_transform([-40.0, 0.0, 40.0], n_sigma), [-n_sigma, 0.0, n_sigma])
    assert_array_equal(truncated_normal_transform(z[:5], None), z[:5])


def test_truncated_fields_match_the_classical_exceedance_probability():
    # Consistency with quakefolio.core.hazard.exceedance_probability (total residual
    # truncated at n sigma and renormalised): exceedance frequencies of simulated ln IM
    # agree within 4 binomial standard errors.
    n_sigma, n = 2.0, 40_000
    fs = FieldSampler([10.0, 10.1], [45.0, 45.0], ["PGA", "SA_1.0"])
    res = fs.sample(np.random.default_rng(16), n)
    mu = np.log([[0.1], [0.05]])
    tau, phi = np.array([[0.35], [0.4]]), np.array([[0.55], [0.6]])
    y = ln_im(mu, tau, phi, res.eta, res.eps, truncation_sigma=n_sigma)
    sigma = np.sqrt(tau**2 + phi**2)
    assert np.all(np.abs((y - mu) / sigma) <= n_sigma + 1e-12)
    ln_levels = np.log([0.02, 0.05, 0.1, 0.2, 0.4])
    for k in range(2):
        expected = exceedance_probability(ln_levels, mu[k, 0], sigma[k, 0], n_sigma)
        got = (y[:, k, 0][:, None] > ln_levels).mean(axis=0)
        assert np.all(np.abs(got - expected) <= 4 * np.sqrt(expected * (1 - expected) / n) + 1e-12)


def test_ln_im_combines_median_and_residuals():
    rng = np.random.default_rng(17)
    eta, eps = rng.standard_normal((4, 2)), rng.standard_normal((4, 2, 3))
    mu, tau, phi = rng.normal(size=(2, 3)), np.full((2, 1), 0.3), np.full((2, 3), 0.5)
    assert_allclose(ln_im(mu, tau, phi, eta, eps), mu + tau * eta[:, :, None] + phi * eps, rtol=1e-15)
    assert_allclose(ln_im(mu, 0.0, 0.0, eta, eps, truncation_sigma=3.0), np.broadcast_to(mu, (4, 2, 3)))
    with pytest.raises(ValueError, match="eta must have shape"):
        ln_im(mu, tau, phi, eta[:, :1], eps)
    with pytest.raises(ValueError, match="truncation_sigma"):
        ln_im(mu, tau, phi, eta, eps, truncation_sigma=-1.0)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"ims": ["PGV"]}, "unknown IM"),
        ({"ims": ["PGA", "PGA"]}, "repeat"),
        ({"ims": ["SA_15.0"]}, r"0.01, 10"),
        ({"ims": ["PGA"], "range_km": -5.0}, "range_km"),
        ({"ims": ["PGA"], "range_km": {"SA_1.0": 5.0}}, "not sampled"),
        ({"ims": ["PGA"], "eigen_variance_share": 0.0}, "eigen_variance_share"),
    ],
)
def test_sampler_rejects_bad_input(kwargs, match):
    with pytest.raises(ValueError, match=match):
        FieldSampler([10.0, 10.1], [45.0, 45.1], **kwargs)
