r"""Lognormal fragility functions fitted to structural-analysis results.

The fitted function is :math:`P(DS \ge ds \mid IM = x) = \Phi(\ln(x/\theta)/\beta)` with
median :math:`\theta` [g] and dispersion :math:`\beta` [-], the form every damage state of
a fragility library uses.  Three kinds of analysis results are supported, each with the
estimator of Baker (2015):

=================  ==============================================  =========================
kind               data                                            estimator
=================  ==============================================  =========================
``msa``            per IM stripe j: ``im_j``, ``n_records_j``,     binomial maximum likelihood
                   ``n_exceed_j`` (multiple-stripe analysis)       (:func:`fit_msa`)
``ida``            per record: the IM at which it fails            moments of ln IM
                   (complete incremental dynamic analysis)         (:func:`fit_ida`)
``ida-truncated``  per record: the IM at failure, or none if it    censored maximum likelihood
                   did not fail up to the largest IM run           (:func:`fit_ida_truncated`)
=================  ==============================================  =========================

Every fit returns a :class:`FragilityFit` with standard errors, an optional extra
dispersion combined by the square root of the sum of squares, and a goodness-of-fit
statistic.  The module also rewrites fragility-library documents (the TOML layout of
:mod:`quakefolio.fragility.library`) with a fitted damage state added or replaced:
:func:`set_damage_state` and :func:`library_to_toml` work on the parsed mapping and on
text, never on files.

References
----------
Baker, J. W. (2015). Efficient analytical fragility function fitting using dynamic
structural analysis. Earthquake Spectra 31(1), 579-599.  Equation numbers quoted in this
module (Eq. 2-3 moments, Eq. 11-12 multiple-stripe likelihood, Eq. 13-14 truncated IDA)
are from memory, not checked against the printed paper.

FEMA P-695 (2009). Quantification of Building Seismic Performance Factors.  Eq. 7-5
(total collapse uncertainty as the square root of the sum of squares of its components),
equation number from memory.
"""
from __future__ import annotations

import copy
import math
import re
from dataclasses import dataclass, field, replace

import numpy as np

from quakefolio.core.lazy import lazy_module
from quakefolio.core.ims import parse_im
from quakefolio.core.risk import lognormal_crossing_im

special = lazy_module("scipy.special")

__all__ = [
    "FragilityFit",
    "GoodnessOfFit",
    "fit_msa",
    "fit_ida",
    "fit_ida_truncated",
    "combine_dispersion",
    "with_extra_dispersion",
    "set_damage_state",
    "library_to_toml",
    "METHODS",
    "CROSSING_TOLERANCE",
]

METHODS = ("msa", "ida", "ida-truncated")
METHOD_TITLES = {
    "msa": "multiple-stripe analysis, binomial maximum likelihood",
    "ida": "complete IDA, moments of ln IM",
    "ida-truncated": "truncated IDA, censored maximum likelihood",
}
_LN_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


# ---------------------------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class GoodnessOfFit:
    """A goodness-of-fit statistic of a fitted fragility function.

    Attributes
    ----------
    test : str
        ``"pearson_chi2"`` (multiple-stripe data), ``"kolmogorov_smirnov"`` (complete IDA)
        or ``"kolmogorov_smirnov_censored"`` (truncated IDA, against the Kaplan-Meier
        estimate).
    statistic : float
    p_value : float or None
        None where no reference distribution applies.
    df : int or None
        Degrees of freedom (chi-square only).
    details : dict
        Extra numbers for the report (e.g. the smallest expected count).
    note : str
        One sentence on how to read the p-value.
    """

    test: str
    statistic: float
    p_value: float | None
    df: int | None = None
    details: dict = field(default_factory=dict)
    note: str = ""

    def line(self):
        """The statistic as one line of text."""
        p = "no p-value" if self.p_value is None else f"p = {self.p_value:.3g}"
        if self.test == "pearson_chi2":
            head = f"Pearson chi-square {self.statistic:.3g} on {self.df} df, {p}"
            extra = f"{self.details['n_stripes']} stripes, smallest expected count {self.details['min_expected']:.3g}"
        elif self.test == "kolmogorov_smirnov":
            head = f"Kolmogorov-Smirnov D = {self.statistic:.3g}, {p}"
            extra = f"{self.details['n']} records"
        else:
            head = f"Kolmogorov-Smirnov D = {self.statistic:.3g} against the Kaplan-Meier estimate, {p}"
            extra = f"{self.details['n_failed']} of {self.details['n']} records failed"
        return f"goodness of fit: {head} ({extra})" + (f"; {self.note}" if self.note else "")

    def to_dict(self):
        """JSON-ready mapping; non-finite numbers become None."""
        out = {"test": self.test, "statistic": self.statistic, "p_value": self.p_value, "df": self.df,
               **self.details, "note": self.note}
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in out.items()}


@dataclass(frozen=True)
class FragilityFit:
    r"""A lognormal fragility function fitted to analysis results.

    Attributes
    ----------
    method : str
        One of :data:`METHODS`.
    median : float [g]
        Fitted median :math:`\theta`.
    beta : float [-]
        Fitted dispersion (record-to-record variability seen in the data).
    ln_median_se, beta_se : float
        Standard errors of :math:`\ln\theta` [-] and :math:`\beta` [-].
    median_se : float [g]
        Standard error of :math:`\theta` by the delta method, ``median * ln_median_se``.
    covariance : ndarray (2, 2)
        Estimated covariance of :math:`(\ln\theta, \beta)`.
    beta_extra : float [-]
        Extra dispersion combined with ``beta`` (0 if none).
    beta_total : float [-]
        :math:`\sqrt{\beta^2 + \beta_{extra}^2}`; the value a library should use.
    n : int
        Number of analyses (multiple-stripe) or records (IDA).
    n_failed : int
        Analyses that reached the damage state (multiple-stripe: exceedances; IDA:
        records with a failure IM).
    n_stripes : int or None
        Number of IM stripes (multiple-stripe data only).
    log_likelihood : float or None
        Maximised log-likelihood (maximum-likelihood methods).
    gof : GoodnessOfFit
    """

    method: str
    median: float
    beta: float
    ln_median_se: float
    beta_se: float
    median_se: float
    covariance: np.ndarray
    beta_extra: float
    beta_total: float
    n: int
    n_failed: int
    gof: GoodnessOfFit
    n_stripes: int | None = None
    log_likelihood: float | None = None
    iterations: int = 0

    def to_dict(self):
        """The JSON-ready summary: method, median, beta, their standard errors, beta_total, n, gof."""
        return {"method": self.method, "median": self.median, "beta": self.beta, "median_se": self.median_se,
                "beta_se": self.beta_se, "beta_total": self.beta_total, "n": self.n, "gof": self.gof.to_dict()}

    def summary_lines(self, source=None):
        """Lines of text for a terminal (without the caution line)."""
        of = f" of {source}" if source else ""
        out = [f"fragility fit{of} ({METHOD_TITLES[self.method]})",
               f"  median      {self.median:.4g} g  (standard error {self.median_se:.2g} g; "
               f"ln median {math.log(self.median):.4g} +/- {self.ln_median_se:.2g})",
               f"  beta        {self.beta:.4g}  (standard error {self.beta_se:.2g})"]
        if self.beta_extra > 0:
            out.append(f"  beta_total  {self.beta_total:.4g}  (beta combined with extra dispersion "
                       f"{self.beta_extra:g} by square root of sum of squares)")
        if self.method == "msa":
            data = f"{self.n_stripes} stripes, {self.n} analyses, {self.n_failed} exceedances"
        elif self.method == "ida":
            data = f"{self.n} records, all failed"
        else:
            standing = self.n - self.n_failed
            data = f"{self.n} records, {self.n_failed} failed, {standing} did not fail up to their largest IM run"
        out.append(f"  n           {self.n}  ({data})")
        out.append(f"  {self.gof.line()}")
        return out


def combine_dispersion(*betas):
    r"""Square root of the sum of squares of dispersions [-].

    :math:`\beta_{total} = \sqrt{\sum_i \beta_i^2}`, the combination of independent
    lognormal uncertainty sources (FEMA P-695, 2009, Eq. 7-5; equation number from
    memory).

    Raises ValueError for a negative or non-finite value.
    """
    b = np.asarray(betas, dtype=float)
    if np.any(~np.isfinite(b)) or np.any(b < 0):
        raise ValueError(f"dispersions must be non-negative finite numbers, got {b.tolist()}")
    return float(np.sqrt(np.sum(b * b)))


def with_extra_dispersion(fit, beta_extra):
    """``fit`` with ``beta_total = combine_dispersion(fit.beta, beta_extra)``."""
    return replace(fit, beta_extra=float(beta_extra), beta_total=combine_dispersion(fit.beta, beta_extra))


def _result(method, ln_median, beta, cov, *, beta_extra, n, n_failed, gof, n_stripes=None, log_likelihood=None,
            iterations=0):
    median = math.exp(ln_median)
    ln_median_se = math.sqrt(cov[0, 0])
    cov.setflags(write=False)
    return FragilityFit(method=method, median=median, beta=float(beta), ln_median_se=ln_median_se,
                        beta_se=math.sqrt(cov[1, 1]), median_se=median * ln_median_se, covariance=cov,
                        beta_extra=float(beta_extra), beta_total=combine_dispersion(beta, beta_extra), n=int(n),
                        n_failed=int(n_failed), gof=gof, n_stripes=n_stripes, log_likelihood=log_likelihood,
                        iterations=iterations)


# ---------------------------------------------------------------------------------------------
# argument checks
# ---------------------------------------------------------------------------------------------
def _vector(name, values, *, allow_nan=False):
    a = np.asarray(values, dtype=float)
    if a.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {a.shape}")
    bad = np.isinf(a) if allow_nan else ~np.isfinite(a)
    if bad.any():
        raise ValueError(f"{name} must be finite, got {a[bad][:3].tolist()}")
    return a


def _counts(name, values):
    a = _vector(name, values)
    if np.any(a < 0) or np.any(a != np.round(a)):
        raise ValueError(f"{name} must be non-negative integers, got {a[(a < 0) | (a != np.round(a))][:3].tolist()}")
    return a


def _check_beta_extra(beta_extra):
    b = float(beta_extra)
    if not math.isfinite(b) or b < 0:
        raise ValueError(f"beta_extra must be a non-negative number, got {beta_extra!r}")
    return b


# ---------------------------------------------------------------------------------------------
# Newton iteration for concave log-likelihoods
# ---------------------------------------------------------------------------------------------
def _inverse_mills(eta):
    r""":math:`\phi(\eta)/\Phi(\eta)`, computed in logs so that it stays finite far in the tails."""
    return np.exp(-0.5 * eta * eta - _LN_SQRT_2PI - special.log_ndtr(eta))


def _maximise_concave(parts, start, *, what, max_iter=200):
    """Newton-Raphson with step halving for a concave log-likelihood.

    ``parts(t)`` returns ``(loglik, gradient, hessian)``.  Returns ``(t, loglik, hessian,
    iterations)``.  Concavity makes the maximum unique and the halving search safe.
    """
    t = np.asarray(start, dtype=float)
    ll, g, h = parts(t)
    for it in range(1, max_iter + 1):
        try:
            step = -np.linalg.solve(h, g)
        except np.linalg.LinAlgError:
            raise ValueError(f"{what}: the likelihood is flat in some direction (singular Hessian); "
                             "the data cannot determine both median and beta") from None
        s = 1.0
        while True:
            t_new = t + s * step
            ll_new, g_new, h_new = parts(t_new)
            if np.isfinite(ll_new) and ll_new >= ll - 1e-12 * (1.0 + abs(ll)):
                break
            s *= 0.5
            if s < 1e-10:
                raise ValueError(f"{what}: the maximum-likelihood iteration stalled")
        done = np.max(np.abs(s * step) / (1.0 + np.abs(t))) < 1e-11
        t, ll, g, h = t_new, ll_new, g_new, h_new
        if done:
            if np.any(np.linalg.eigvalsh(h) >= 0):
                raise ValueError(f"{what}: the likelihood has no strict maximum (Hessian not negative definite)")
            return t, ll, h, it
    raise ValueError(f"{what}: the maximum-likelihood iteration did not converge in {max_iter} steps")


def _covariance_median_beta(h_ab, jac):
    r"""Covariance of :math:`(\ln\theta, \beta)` from the observed information in (a, b).

    At the maximum the gradient vanishes, so the observed information transforms
    exactly with the Jacobian: :math:`C = J (-H)^{-1} J^T`.
    """
    cov_ab = np.linalg.inv(-h_ab)
    cov = jac @ cov_ab @ jac.T
    return 0.5 * (cov + cov.T)


# ---------------------------------------------------------------------------------------------
# multiple-stripe analysis
# ---------------------------------------------------------------------------------------------
def fit_msa(im, n_records, n_exceed, *, beta_extra=0.0):
    r"""Fit a lognormal fragility function to multiple-stripe analysis results.

    Parameters
    ----------
    im : array_like (m,) [g], positive
        Intensity of each stripe (a value may repeat).
    n_records : array_like (m,) [-], positive integers
        Analyses run at each stripe.
    n_exceed : array_like (m,) [-], integers in ``[0, n_records]``
        Analyses that reached the damage state.
    beta_extra : float [-], optional
        Extra dispersion combined into ``beta_total`` (:func:`combine_dispersion`).

    Returns
    -------
    FragilityFit

    Notes
    -----
    With :math:`p_j = \Phi(\ln(x_j/\theta)/\beta)`, the number of exceedances at stripe
    :math:`j` is binomial and the estimates maximise (Baker 2015, Eq. 11-12)

    .. math:: \ln L = \sum_j \ln\binom{n_j}{z_j} + z_j \ln p_j + (n_j - z_j)\ln(1 - p_j).

    The maximisation runs in the probit parameters :math:`a = -\ln\theta/\beta`,
    :math:`b = 1/\beta` (so :math:`p_j = \Phi(a + b \ln x_j)`), where the log-likelihood
    is concave (from memory: a property of the probit model with log-concave
    :math:`\Phi`); Newton-Raphson with step halving then converges to the unique maximum.
    :math:`\ln\Phi` and the ratio :math:`\phi/\Phi` are evaluated in logs, so stripes
    far in the tails do not underflow.  The start is a weighted least-squares line
    through the probits of the smoothed fractions :math:`(z_j + 1/2)/(n_j + 1)`
    (minimum chi-square weights).

    Standard errors are the square roots of the diagonal of the inverse observed
    information (minus the Hessian of :math:`\ln L`) at the maximum, transformed to
    :math:`(\ln\theta, \beta)` by the Jacobian (exact at the maximum); the median's by
    the delta method, :math:`se(\theta) = \theta\, se(\ln\theta)`.

    Goodness of fit: Pearson's statistic over the stripes,
    :math:`X^2 = \sum_j (z_j - n_j p_j)^2 / (n_j p_j (1 - p_j))`, referred to a
    chi-square distribution with :math:`m - 2` degrees of freedom (two fitted parameters;
    the approximation is rough when expected counts fall below about 5, common practice).

    A finite maximum exists only when the outcomes overlap: some stripe without full
    exceedance must lie at a higher IM than some stripe with an exceedance.  Otherwise
    (e.g. a single stripe with mixed outcomes between all-zero and all-one stripes) the
    likelihood keeps growing as beta goes to zero and ValueError is raised; two stripes
    with mixed outcomes always suffice.  Data whose exceedances all lie at or below the
    IMs of all non-exceedances, or whose fitted slope is not positive, describe a
    probability that decreases with IM and are refused too.
    """
    x = _vector("im", im)
    n = _counts("n_records", n_records)
    z = _counts("n_exceed", n_exceed)
    if not (x.shape == n.shape == z.shape):
        raise ValueError(f"im, n_records and n_exceed need the same length, got {x.size}, {n.size}, {z.size}")
    if x.size == 0:
        raise ValueError("no stripes given")
    if np.any(x <= 0):
        raise ValueError(f"im must be positive, got {x[x <= 0][:3].tolist()}")
    if np.any(n <= 0):
        raise ValueError("n_records must be at least 1 at every stripe")
    if np.any(z > n):
        j = int(np.argmax(z > n))
        raise ValueError(f"n_exceed ({z[j]:g}) exceeds n_records ({n[j]:g}) at im = {x[j]:g}")
    beta_extra = _check_beta_extra(beta_extra)
    what = "multiple-stripe fit"
    if z.sum() == 0:
        raise ValueError(f"{what}: no analysis reached the damage state (every n_exceed is 0); "
                         "the data say only that the median lies above the highest stripe")
    if z.sum() == n.sum():
        raise ValueError(f"{what}: every analysis reached the damage state (n_exceed = n_records at every "
                         "stripe); the data say only that the median lies below the lowest stripe")
    lx = np.log(x)
    highest_not_all = lx[z < n].max()
    lowest_some = lx[z > 0].min()
    if not highest_not_all > lowest_some:
        n_mixed = int(np.sum((z > 0) & (z < n)))
        raise ValueError(
            f"{what}: the outcomes do not overlap ({n_mixed} stripe(s) with mixed outcomes; every stripe below "
            f"im = {math.exp(lowest_some):g} g has no exceedance and every stripe above "
            f"im = {math.exp(highest_not_all):g} g has only exceedances), so the likelihood keeps growing as "
            "beta goes to 0; add stripes in between (two stripes with mixed outcomes suffice)")
    if lx[z > 0].max() <= lx[z < n].min():
        raise ValueError(f"{what}: the fraction of exceedances decreases with IM (every exceedance lies at or below "
                         "the IM of every non-exceedance); these data do not describe a fragility function")

    log_comb = float(np.sum(special.gammaln(n + 1) - special.gammaln(z + 1) - special.gammaln(n - z + 1)))

    def parts(t):
        a, b = t
        eta = a + b * lx
        ll = log_comb + float(np.sum(z * special.log_ndtr(eta) + (n - z) * special.log_ndtr(-eta)))
        lam_p, lam_m = _inverse_mills(eta), _inverse_mills(-eta)
        s = z * lam_p - (n - z) * lam_m
        w = -z * lam_p * (eta + lam_p) - (n - z) * lam_m * (lam_m - eta)
        g = np.array([s.sum(), (s * lx).sum()])
        h = np.array([[w.sum(), (w * lx).sum()], [(w * lx).sum(), (w * lx * lx).sum()]])
        return ll, g, h

    t, ll, h, iterations = _maximise_concave(parts, _msa_start(lx, n, z), what=what)
    a, b = t
    if b <= 0:
        raise ValueError(f"{what}: the fitted probability decreases with IM (maximum-likelihood slope {b:.3g} <= 0); "
                         "these data do not describe a fragility function")
    ln_median, beta = -a / b, 1.0 / b
    jac = np.array([[-1.0 / b, a / b**2], [0.0, -1.0 / b**2]])
    cov = _covariance_median_beta(h, jac)
    return _result("msa", ln_median, beta, cov, beta_extra=beta_extra, n=n.sum(), n_failed=z.sum(),
                   gof=_pearson_chi_square(lx, n, z, a, b), n_stripes=x.size, log_likelihood=ll,
                   iterations=iterations)


def _msa_start(lx, n, z):
    """Weighted least squares of probit((z + 1/2)/(n + 1)) on ln IM (minimum chi-square start)."""
    p = (z + 0.5) / (n + 1.0)
    y = special.ndtri(p)
    w = n * np.exp(-y * y) / (2.0 * np.pi * p * (1.0 - p))
    xm = np.sum(w * lx) / w.sum()
    ym = np.sum(w * y) / w.sum()
    sxx = np.sum(w * (lx - xm) ** 2)
    b = np.sum(w * (lx - xm) * (y - ym)) / sxx if sxx > 0 else 0.0
    if not (np.isfinite(b) and b > 0):  # any start works for a concave objective; this one is merely sensible
        b = 1.0 / max(float(np.sqrt(sxx / w.sum())) if sxx > 0 else 0.0, 0.3)
    return np.array([ym - b * xm, b])


def _pearson_chi_square(lx, n, z, a, b):
    from scipy.stats import chi2

    eta = a + b * lx
    # expected exceedances and non-exceedances, each without cancellation
    e1, e0 = n * special.ndtr(eta), n * special.ndtr(-eta)
    d2 = (z - e1) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(d2 == 0, 0.0, d2 / e1 + d2 / e0)
    stat = float(np.sum(terms))
    df = int(lx.size - 2)
    details = {"n_stripes": int(lx.size), "min_expected": float(np.min(np.minimum(e1, e0)))}
    if df < 1:
        return GoodnessOfFit("pearson_chi2", stat, None, df, details,
                             "no p-value: needs at least 3 stripes (two parameters are fitted)")
    note = "p-value approximate: expected counts below 5" if details["min_expected"] < 5 else ""
    return GoodnessOfFit("pearson_chi2", stat, float(chi2.sf(stat, df)), df, details, note)


# ---------------------------------------------------------------------------------------------
# incremental dynamic analysis
# ---------------------------------------------------------------------------------------------
def fit_ida(im_at_failure, *, beta_extra=0.0):
    r"""Fit a lognormal fragility function to complete IDA results by moments of ln IM.

    Parameters
    ----------
    im_at_failure : array_like (n,) [g], positive
        IM at which each record first reaches the damage state; every record fails.
    beta_extra : float [-], optional
        Extra dispersion combined into ``beta_total``.

    Notes
    -----
    Baker (2015), Eq. 2-3:

    .. math:: \ln\hat\theta = \frac{1}{n}\sum_i \ln x_i, \qquad
              \hat\beta = \sqrt{\frac{1}{n-1}\sum_i (\ln x_i - \ln\hat\theta)^2}

    i.e. the mean and the sample standard deviation with ``ddof=1`` of ln IM.

    Standard errors, for normally distributed ln IM: :math:`se(\ln\theta) =
    \hat\beta/\sqrt{n}`; :math:`se(\beta) = \hat\beta/\sqrt{2(n-1)}`, the normal
    approximation to :math:`(n-1)\hat\beta^2/\beta^2 \sim \chi^2_{n-1}` carried to
    :math:`\hat\beta` by the delta method.  The two estimates are independent
    (covariance 0).

    Goodness of fit: the Kolmogorov-Smirnov statistic of the IMs against the fitted
    lognormal (``scipy.stats.kstest``).  Its p-value assumes parameters fixed in
    advance; with parameters fitted to the same data it is too large (conservative).
    """
    from scipy.stats import kstest, lognorm

    x = _vector("im_at_failure", im_at_failure)
    beta_extra = _check_beta_extra(beta_extra)
    if x.size < 2:
        raise ValueError(f"complete IDA fit: needs at least 2 records, got {x.size}")
    if np.any(x <= 0):
        raise ValueError(f"im_at_failure must be positive, got {x[x <= 0][:3].tolist()}")
    y = np.log(x)
    ln_median, beta = float(np.mean(y)), float(np.std(y, ddof=1))
    if not beta > 0:
        raise ValueError(f"complete IDA fit: every record fails at the same IM ({x[0]:g} g); beta would be 0")
    n = x.size
    cov = np.diag([beta**2 / n, beta**2 / (2.0 * (n - 1))])
    res = kstest(x, lognorm(s=beta, scale=math.exp(ln_median)).cdf)
    gof = GoodnessOfFit("kolmogorov_smirnov", float(res.statistic), float(res.pvalue), None, {"n": int(n)},
                        "p-value too large: median and beta were fitted to the same records")
    return _result("ida", ln_median, beta, cov, beta_extra=beta_extra, n=n, n_failed=n, gof=gof)


def fit_ida_truncated(im_at_failure, im_max, *, beta_extra=0.0):
    r"""Fit a lognormal fragility function to truncated IDA results (censored likelihood).

    Parameters
    ----------
    im_at_failure : array_like (n,) [g]
        IM at which each record failed; NaN for a record that did not fail up to its
        largest IM run.
    im_max : float or array_like (n,) [g], positive
        Largest IM run for each record (one value for all, or one per record).  A
        failure must not lie above it.
    beta_extra : float [-], optional
        Extra dispersion combined into ``beta_total``.

    Notes
    -----
    A record failing at :math:`x_i` contributes the lognormal density, a record still
    standing at :math:`x_{max,i}` the probability of a capacity above it (Baker 2015,
    Eq. 13-14, in its censored-normal form):

    .. math:: \ln L = \sum_{failed} \ln\left[\frac{1}{\beta x_i}
              \phi\!\left(\frac{\ln x_i - \ln\theta}{\beta}\right)\right]
              + \sum_{standing} \ln\left[1 - \Phi\!\left(\frac{\ln x_{max,i} -
              \ln\theta}{\beta}\right)\right].

    It is maximised in :math:`a = \ln\theta/\beta`, :math:`b = 1/\beta`, where the
    censored-normal log-likelihood is concave (from memory: Olsen 1978, Econometrica
    46(5), for the Tobit model), by Newton-Raphson with step halving from the moments of
    the failures.  Standard errors come from the inverse observed information at the
    maximum, as in :func:`fit_msa`.  Without censored records the estimates are the mean
    and the ``ddof=0`` standard deviation of ln IM (the maximum-likelihood estimates),
    not the ``ddof=1`` value of :func:`fit_ida`.

    Goodness of fit: the largest distance between the fitted CDF and the Kaplan-Meier
    (product-limit) estimate of the capacity distribution, up to the largest IM
    observed; with no censoring it equals the Kolmogorov-Smirnov statistic.  No p-value
    is given: the KS distribution does not apply to censored data.
    """
    x = _vector("im_at_failure", im_at_failure, allow_nan=True)
    cap = np.broadcast_to(np.asarray(im_max, dtype=float), x.shape).astype(float)
    beta_extra = _check_beta_extra(beta_extra)
    what = "truncated IDA fit"
    if x.size == 0:
        raise ValueError(f"{what}: no records given")
    failed = ~np.isnan(x)
    if np.any(x[failed] <= 0):
        raise ValueError(f"im_at_failure must be positive, got {x[failed & (x <= 0)][:3].tolist()}")
    if np.any(~np.isfinite(cap)) or np.any(cap <= 0):
        raise ValueError(f"im_max must be positive and finite, got {cap[~(cap > 0) | ~np.isfinite(cap)][:3].tolist()}")
    above = failed & (x > cap)
    if above.any():
        i = int(np.argmax(above))
        raise ValueError(f"{what}: record {i + 1} fails at {x[i]:g} g, above its largest IM run {cap[i]:g} g")
    y = np.log(x[failed])
    c = np.log(cap[~failed])
    if np.unique(y).size < 2:
        raise ValueError(f"{what}: needs failures at 2 or more distinct IMs, got {y.size} failure(s) at "
                         f"{np.unique(np.exp(y)).size} distinct IM(s); the likelihood has no maximum otherwise")

    def parts(t):
        a, b = t
        u = b * y - a
        eta = a - b * c
        ll = float(np.sum(math.log(b) - _LN_SQRT_2PI - 0.5 * u * u - y) + np.sum(special.log_ndtr(eta)))
        lam = _inverse_mills(eta)
        w = -lam * (eta + lam)
        g = np.array([u.sum() + lam.sum(), y.size / b - (u * y).sum() - (lam * c).sum()])
        h = np.array([[-y.size + w.sum(), y.sum() - (w * c).sum()],
                      [y.sum() - (w * c).sum(), -y.size / b**2 - (y * y).sum() + (w * c * c).sum()]])
        return ll, g, h

    s0 = float(np.std(y))
    start = np.array([float(np.mean(y)) / s0, 1.0 / s0])
    t, ll, h, iterations = _maximise_concave(parts, start, what=what)
    a, b = t
    ln_median, beta = a / b, 1.0 / b
    jac = np.array([[1.0 / b, -a / b**2], [0.0, -1.0 / b**2]])
    cov = _covariance_median_beta(h, jac)
    gof = _censored_ks(np.log(x[failed]), c, ln_median, beta, n=x.size)
    return _result("ida-truncated", ln_median, beta, cov, beta_extra=beta_extra, n=x.size, n_failed=int(failed.sum()),
                   gof=gof, log_likelihood=ll, iterations=iterations)


def _censored_ks(y, c, ln_median, beta, *, n):
    """Sup distance between the fitted CDF and the Kaplan-Meier estimate (ln IM failures ``y``, censored at ``c``)."""
    fitted = lambda v: special.ndtr((v - ln_median) / beta)  # noqa: E731
    times, d = np.unique(y, return_counts=True)
    at_risk = (y.size - np.searchsorted(np.sort(y), times)) + (c.size - np.searchsorted(np.sort(c), times))
    km = 1.0 - np.cumprod(1.0 - d / at_risk)  # estimate of P(capacity <= t) at each failure IM
    before = np.concatenate([[0.0], km[:-1]])
    f = fitted(times)
    stat = float(max(np.max(np.abs(km - f)), np.max(np.abs(before - f))))
    end = max(times[-1], c.max() if c.size else times[-1])
    if end > times[-1]:  # the estimate stays flat after the last failure up to the largest IM observed
        stat = max(stat, float(abs(km[-1] - fitted(end))))
    return GoodnessOfFit("kolmogorov_smirnov_censored", stat, None, None, {"n": int(n), "n_failed": int(y.size)},
                         "the KS distribution does not apply to censored data")


# ---------------------------------------------------------------------------------------------
# fragility-library documents
# ---------------------------------------------------------------------------------------------
CROSSING_TOLERANCE = 1e-3
"""Largest out-of-order probability allowed where a fitted state's curve crosses a neighbour's [-]."""

_CLASS_KEY_ORDER = ("description", "im", "collapse_state")
_STATE_KEY_ORDER = ("name", "median", "beta", "mean_damage_ratio", "cov", "downtime_days", "casualty_rate")
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def _round_sig(value, digits=4):
    return float(f"{value:.{digits}g}")


def set_damage_state(library, class_code, state_name, median, beta, *, mean_damage_ratio=None, cov=None, im=None,
                     digits=4):
    r"""A copy of a parsed fragility-library mapping with one damage state added or replaced.

    Parameters
    ----------
    library : dict
        The mapping of a library file (``{"format": ..., "classes": {...}}``), as parsed
        by :mod:`tomllib`; it is not modified.
    class_code, state_name : str
    median : float [g]; beta : float [-]
        The fitted values (use ``FragilityFit.beta_total``); stored to ``digits``
        significant digits.
    mean_damage_ratio, cov : float, optional
        Consequence of the state; required for a new state, kept from the file when a
        state is replaced and they are not given.
    im : str, optional
        IM of the fit; required for a new class, and must equal the class's IM otherwise.

    Returns
    -------
    (dict, list of str)
        The new mapping and notes for the user.

    Notes
    -----
    A replaced state keeps its place; a new state goes where its median puts it.  The
    call is refused (ValueError) when the medians would no longer increase with
    severity, when the mean damage ratios would decrease, or when the fitted curve
    crosses a neighbouring state's curve with more than :data:`CROSSING_TOLERANCE` of
    out-of-order probability.  Two lognormal curves cross once, at :math:`x^*`
    (:func:`quakefolio.core.risk.lognormal_crossing_im`), where both equal :math:`p^*`;
    beyond it the more severe state's curve is the higher one, by at most :math:`p^*`
    when the crossing is on the low side (the severe state has the larger beta) and at
    most :math:`1 - p^*` on the high side.  That bound is what is compared with the
    tolerance (independent of any hazard curve; a run still checks crossings inside its
    hazard range).
    """
    new_state = _new_state(state_name, median, beta, mean_damage_ratio, cov, digits)
    data = copy.deepcopy(library)
    classes = data.setdefault("classes", {})
    if class_code not in classes:
        return data, [_create_class(classes, class_code, state_name, new_state, im, mean_damage_ratio)]
    body = classes[class_code]
    if im is not None and parse_im(im) != parse_im(str(body.get("im"))):
        raise ValueError(f"class {class_code!r} uses {body.get('im')}, not {parse_im(im)}; a fit on another IM "
                         "cannot go into this class")
    states = body.setdefault("states", [])
    pos, notes = _place_state(body, states, class_code, state_name, new_state, mean_damage_ratio)
    _check_neighbours(class_code, states, pos)
    return data, notes


def _new_state(state_name, median, beta, mean_damage_ratio, cov, digits):
    """The state's table entry from checked arguments (median and beta rounded to ``digits``)."""
    if not isinstance(state_name, str) or not state_name.strip():
        raise ValueError(f"the damage-state name must be a non-empty string, got {state_name!r}")
    for label, v in (("median", median), ("beta", beta)):
        if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
            raise ValueError(f"{label} must be a positive number, got {v!r}")
    new_state = {"name": state_name, "median": _round_sig(median, digits), "beta": _round_sig(beta, digits)}
    if mean_damage_ratio is not None:
        if not 0 <= float(mean_damage_ratio) <= 1:
            raise ValueError(f"the mean damage ratio must lie in [0, 1], got {mean_damage_ratio!r}")
        new_state["mean_damage_ratio"] = float(mean_damage_ratio)
    if cov is not None:
        if not (math.isfinite(float(cov)) and float(cov) >= 0):
            raise ValueError(f"cov must be a non-negative number, got {cov!r}")
        new_state["cov"] = float(cov)
    return new_state


def _create_class(classes, class_code, state_name, new_state, im, mean_damage_ratio):
    """Add a new class holding the one state; returns the note for the user."""
    if im is None:
        raise ValueError(f"class {class_code!r} is not in the library; give its IM (--im) to create it")
    if mean_damage_ratio is None:
        raise ValueError(f"state {state_name!r} is new; give its mean damage ratio (--mean-damage-ratio)")
    classes[class_code] = {"im": parse_im(im), "states": [new_state]}
    return f"created class {class_code!r} ({parse_im(im)}) with state {state_name!r}"


def _place_state(body, states, class_code, state_name, new_state, mean_damage_ratio):
    """Replace the state of that name in place, or insert it where its median puts it.

    Returns
    -------
    (int, list of str)
        The state's position and notes for the user.
    """
    names = [s.get("name") for s in states]
    if state_name in names:
        pos = names.index(state_name)
        merged = dict(states[pos])
        merged.update(new_state)
        states[pos] = merged
        return pos, [f"replaced state {state_name!r} of class {class_code!r}"]
    if mean_damage_ratio is None:
        raise ValueError(f"state {state_name!r} is new in class {class_code!r}; give its mean damage ratio "
                         "(--mean-damage-ratio)")
    medians = [float(s.get("median", math.nan)) for s in states]
    pos = int(np.searchsorted(medians, new_state["median"]))
    states.insert(pos, new_state)
    notes = [f"added state {state_name!r} to class {class_code!r} at position {pos + 1} of {len(states)}"]
    if pos == len(states) - 1 and "collapse_state" not in body:
        notes.append(f"{state_name!r} is now the last state of {class_code!r}, which sets no collapse_state, "
                     "so it is the collapse state")
    return pos, notes


def _check_neighbours(class_code, states, pos):
    cur = states[pos]
    for other_pos in (pos - 1, pos + 1):
        if not 0 <= other_pos < len(states):
            continue
        lo, hi = (states[other_pos], cur) if other_pos < pos else (cur, states[other_pos])
        m_lo, m_hi = float(lo["median"]), float(hi["median"])
        if not m_hi > m_lo:
            raise ValueError(f"class {class_code!r}: damage states out of order: medians must increase with severity, "
                             f"got {m_lo:g} g for {lo['name']!r} then {m_hi:g} g for {hi['name']!r}")
        r_lo, r_hi = lo.get("mean_damage_ratio"), hi.get("mean_damage_ratio")
        if r_lo is not None and r_hi is not None and float(r_hi) < float(r_lo):
            raise ValueError(f"class {class_code!r}: damage states out of order: mean damage ratios must not "
                             f"decrease with severity, got {float(r_lo):g} for {lo['name']!r} then {float(r_hi):g} "
                             f"for {hi['name']!r}")
        b_lo, b_hi = float(lo["beta"]), float(hi["beta"])
        x = float(lognormal_crossing_im(m_lo, b_lo, m_hi, b_hi))
        if not math.isfinite(x) or x <= 0:
            continue
        p = float(special.ndtr(math.log(x / m_lo) / b_lo))
        bound = p if b_hi > b_lo else 1.0 - p
        if bound > CROSSING_TOLERANCE:
            side = "below" if b_hi > b_lo else "above"
            raise ValueError(f"class {class_code!r}: the curves of {lo['name']!r} and {hi['name']!r} cross at "
                             f"{x:.4g} g, where both give P = {p:.4g}; {side} it P({hi['name']}) exceeds "
                             f"P({lo['name']}) by up to {bound:.3g} (tolerance {CROSSING_TOLERANCE:g})")


def _toml_key(key):
    return key if _BARE_KEY.match(key) else _toml_string(key)


def _toml_string(s):
    out = []
    for ch in s:
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif ord(ch) < 32 or ord(ch) == 127:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _toml_value(v, where):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"{where}: cannot write the non-finite number {v!r}")
        return repr(v)
    if isinstance(v, str):
        return _toml_string(v)
    raise ValueError(f"{where}: cannot write a value of type {type(v).__name__} in the library layout")


def _ordered(table, order):
    keys = [k for k in order if k in table] + [k for k in table if k not in order]
    return [(k, table[k]) for k in keys]


def library_to_toml(library, *, header=""):
    """Fragility-library mapping as TOML text in the library layout.

    Only the layout of :mod:`quakefolio.fragility.library` is written: a ``format``
    line, one ``[classes.<code>]`` table per class and one ``[[classes.<code>.states]]``
    table per damage state, one key per line (strings, integers, finite floats).
    ``header`` (comment lines) goes first.  Comments inside the original file are not
    kept.
    """
    lines = [ln if ln.startswith("#") or not ln.strip() else f"# {ln}" for ln in header.splitlines()]
    for key, value in library.items():
        if key != "classes":
            lines.append(f"{_toml_key(key)} = {_toml_value(value, key)}")
    for code, body in library.get("classes", {}).items():
        head = f"classes.{_toml_key(code)}"
        lines += ["", f"[{head}]"]
        for key, value in _ordered(body, _CLASS_KEY_ORDER):
            if key != "states":
                lines.append(f"{_toml_key(key)} = {_toml_value(value, f'{head}.{key}')}")
        for i, state in enumerate(body.get("states", [])):
            lines += ["", f"[[{head}.states]]"]
            for key, value in _ordered(state, _STATE_KEY_ORDER):
                lines.append(f"{_toml_key(key)} = {_toml_value(value, f'{head}.states[{i}].{key}')}")
    return "\n".join(lines).lstrip("\n") + "\n"
