r"""Correlated ground-motion fields for the event-based portfolio stage.

For an event (one rupture occurrence) the natural log of intensity measure :math:`k` at
site :math:`i` is

.. math:: \ln IM_{k,i} = \mu_{k,i} + \tau_{k}\,\eta_k + \phi_{k,i}\,\varepsilon_{k,i},

with :math:`\mu, \tau, \phi` from a ground-motion model (:class:`~quakefolio.core.gmm.GmmResult`),
:math:`\eta_k` the standard-normal between-event residual (one per event and IM) and
:math:`\varepsilon_{k,i}` the standard-normal within-event residual field
(:func:`ln_im`). This module samples :math:`\eta` and :math:`\varepsilon` with

* **spatial correlation** of :math:`\varepsilon_k` between sites at separation
  :math:`h` [km]: :math:`\rho_k(h) = \exp(-3h/b_k)`, range :math:`b_k` from Jayaram &
  Baker (2009) (:func:`jb09_range_km`);
* **cross-IM correlation** from Baker & Jayaram (2008) (:func:`bj08_correlation`),
  for :math:`\eta` across IMs and for :math:`\varepsilon` across IMs at a site
  (approximately, see below).

Sampling (:class:`FieldSampler`)
--------------------------------
Everything that depends only on the sites is computed once per site set: local
east/north coordinates (azimuthal equidistant projection about the sites' mean
position, :func:`~quakefolio.core.sources.geometry.aeqd_forward`), distances between unique
sites, one correlation matrix :math:`C_k` per distinct range and a factor :math:`L_k`
with :math:`L_k L_k^T \approx C_k`. A chunk of events then costs one random draw and,
per IM, one (blocked) matrix product :math:`\varepsilon_k = W_k L_k^T` for all its events.

*Dense route* (at most :data:`DENSE_MAX_SITES` unique sites): :math:`L_k` is the
Cholesky factor of :math:`C_k`, exact. The exponential model is positive definite for
distinct points, so no jitter is added; if the factorisation nevertheless fails
(sites a few metres apart, or a range so long that :math:`C_k` is numerically of low
rank, such as ``range_km=inf``), the sampler switches to the eigen route with every
numerically positive eigenvalue kept (an exact symmetric square root up to round-off).

*Eigen route* (more unique sites, up to :data:`EIGEN_MAX_SITES`): the eigenvectors
:math:`V` (n x r) of the correlation matrix with the *shortest* range (its spectrum
decays most slowly) for the largest eigenvalues, with r the smallest rank keeping a
share :data:`EIGEN_VARIANCE_SHARE` (99 %) of its variance :math:`\operatorname{tr} C = n`;
r is increased until every IM's matrix keeps that share in the same basis. Each IM's
factor is :math:`L_k = V (V^T C_k V)^{1/2}`, so every IM uses the *same* r white-noise
components (needed for the cross-IM coupling). Rows are then re-normalised to unit
length, so **each site keeps unit variance**; the discarded variance (<= 1 %) is
removed from the correlations instead, which become
:math:`(V M_k V^T)_{ij}/\sqrt{s_i s_j}` with :math:`s_i` the kept variance at site i.
Cost: one n x n matrix and one O(n^3) symmetric eigen-decomposition per site set, and
n x r per IM for the factors; r grows as sites get sparser relative to the range.

Cross-IM correlation: separable approximation
---------------------------------------------
Let :math:`R` be the Baker & Jayaram (2008) matrix of the IMs and :math:`A` its Cholesky
factor. White noise :math:`Z` (events x IMs x r) is correlated across IMs component by
component, :math:`W_{\cdot j} = A Z_{\cdot j}`, and each IM's spatial factor is applied
to its own component: :math:`\varepsilon_k = L_k W_k`. Then

.. math:: \operatorname{Cov}(\varepsilon_{k,i}, \varepsilon_{l,i'}) = R_{kl}\,(L_k L_l^T)_{ii'}.

* Exact: the spatial correlation of each IM (:math:`k = l`: :math:`C_k`), the marginal
  unit variances, and the cross-IM correlation of :math:`\eta`.
* Exact: the cross-IM correlation at one site when the two IMs have the same range
  (:math:`L_k = L_l`), and at every site when spatial correlation is off.
* Approximate: cross-IM correlation at one site when ranges differ, attenuated by
  :math:`c_{kl,i} = (L_k L_l^T)_{ii} \le 1` (Cauchy-Schwarz); with the Cholesky
  factors, for instance, about 0.85 for ranges 8.5 and 25.7 km (PGA and SA(1 s), no
  clustering) and about 0.98 for ranges 8.5 and 12 km (measured on random sites; the
  value depends on the layout: see :meth:`FieldSampler.colocated_cross_im_correlation`).
* Approximate: cross-IM correlation at separation, :math:`R_{kl}(L_k L_l^T)_{ii'}`,
  which is not a fitted model. Loth & Baker (2013) give a fitted spatial
  cross-correlation model (linear model of coregionalisation) as the exact alternative.

Truncation
----------
The classical engine (:func:`~quakefolio.core.hazard.exceedance_probability`)
truncates the *total* normalised residual :math:`e = (\ln IM - \mu)/\sigma` at
:math:`\pm n` and renormalises. :func:`ln_im` reproduces exactly that marginal: the
Gaussian total residual :math:`e = (\tau\eta + \phi\varepsilon)/\sigma`,
:math:`\sigma = \sqrt{\tau^2 + \phi^2}`, is mapped site by site through
:math:`e' = \Phi^{-1}\big(\Phi(-n) + (1 - 2\Phi(-n))\,\Phi(e)\big)`
(:func:`truncated_normal_transform`; a Gaussian copula). Each :math:`e'` is exactly
standard normal truncated to :math:`[-n, n]`, so the exceedance frequencies of
simulated fields converge to the classical engine's
:math:`[\Phi(-\varepsilon_x) - \Phi(-n)]/[1 - 2\Phi(-n)]` site by site. Limits: the
dependence between sites and IMs is kept as a Gaussian copula (rank correlations
unchanged), but Pearson correlations of the truncated totals differ slightly from the
untruncated ones (negligibly for n >= 2); :math:`\eta` and :math:`\varepsilon` themselves
stay Gaussian (only their combination is truncated); and :math:`\sigma` here is
:math:`\sqrt{\tau^2 + \phi^2}`, which equals a model's total sigma exactly only at its
tabulated periods. ``None`` means untruncated.

References
----------
Jayaram, N., Baker, J. W. (2009). Correlation model for spatially distributed
ground-motion intensities. Earthquake Engineering & Structural Dynamics 38(15),
1687-1708. doi:10.1002/eqe.922.
Baker, J. W., Jayaram, N. (2008). Correlation of spectral acceleration values from NGA
ground motion models. Earthquake Spectra 24(1), 299-317. doi:10.1193/1.2857544.
Loth, C., Baker, J. W. (2013). A spatial cross-correlation model of spectral
accelerations at multiple periods. Earthquake Engineering & Structural Dynamics 42(3),
397-417. doi:10.1002/eqe.2212.
Golub, G. H., Van Loan, C. F. (2013). Matrix Computations, 4th ed. Johns Hopkins
University Press (Cholesky factorisation, symmetric eigenproblem).
"""
from __future__ import annotations

import math
import numbers
from collections.abc import Mapping, Sequence
from typing import NamedTuple

import numpy as np

from quakefolio.core.lazy import lazy_module
from numpy.typing import ArrayLike, NDArray

from quakefolio.core.events.eventset import EVENT_BLOCK_SIZE, block_rng, check_seed, event_blocks
from quakefolio.core.sources.geometry import aeqd_forward, mean_position
from quakefolio.core.ims import PGA_PERIOD_S, model_period

sla = lazy_module("scipy.linalg")
special = lazy_module("scipy.special")

__all__ = [
    "DENSE_MAX_SITES",
    "EIGEN_MAX_SITES",
    "EIGEN_VARIANCE_SHARE",
    "BJ08_PGA_PERIOD_S",
    "jb09_range_km",
    "jb09_correlation",
    "bj08_correlation",
    "cross_im_correlation_matrix",
    "truncated_normal_transform",
    "ln_im",
    "residual_term",
    "check_standard_deviations",
    "Residuals",
    "FieldSampler",
]

FloatArray = NDArray[np.float64]

#: Largest number of unique sites factored densely (Cholesky of an n x n matrix: 72 MB
#: per distinct range at n = 3000, and a (block x n) @ (n x n) product per IM).
DENSE_MAX_SITES = 3000
#: Largest number of unique sites accepted at all: the eigen route still builds n x n
#: matrices (3.2 GB each at 20 000 sites) and one O(n^3) eigen-decomposition. Beyond
#: this, split the portfolio into regions or snap assets to a coarser site grid.
EIGEN_MAX_SITES = 20_000
#: Share of the variance tr(C) = n kept by the truncated eigen route (rows are
#: re-normalised afterwards so every site keeps unit variance).
EIGEN_VARIANCE_SHARE = 0.99
#: Period [s] standing for PGA in the Baker & Jayaram (2008) equation (common practice:
#: the lower end of the equation's 0.01-10 s range).
BJ08_PGA_PERIOD_S = PGA_PERIOD_S

_BJ08_MIN_S, _BJ08_MAX_S = 0.01, 10.0
_ROW_CHUNK = 1024  # rows of an n x n matrix built at a time


# --------------------------------------------------------------------------- #
# Correlation models
# --------------------------------------------------------------------------- #
def jb09_range_km(period_s: ArrayLike, vs30_clustering: bool = False) -> FloatArray:
    r"""Range b [km] of the Jayaram & Baker (2009) within-event correlation model.

    Parameters
    ----------
    period_s : array_like [s]
        Spectral period, >= 0; 0 stands for PGA.
    vs30_clustering : bool
        False (default): case 1, Vs30 values not clustered spatially;
        True: case 2, site Vs30 values spatially clustered (similar sites close together).

    Returns
    -------
    ndarray [km]
        :math:`b = 8.5 + 17.2T` (case 1) or :math:`b = 40.7 - 15.0T` (case 2) for
        :math:`T < 1` s; :math:`b = 22.0 + 3.7T` for :math:`T \ge 1` s in both cases.

    Notes
    -----
    The correlation of within-event residuals at separation :math:`h` is
    :math:`\rho(h) = \exp(-3h/b)` (:func:`jb09_correlation`), so b is the separation at
    which :math:`\rho = e^{-3} \approx 0.05`. Coefficients of the range model of
    Jayaram & Baker (2009) (their Eq. 17; equation number from memory); the T < 1 s
    branches were checked against a published reproduction of the formula, the T >= 1 s branch is
    from memory. The model was fitted for periods up to 10 s (from memory); longer
    periods are extrapolated linearly.

    References
    ----------
    Jayaram & Baker (2009), EESD 38(15), 1687-1708.
    """
    t = np.asarray(period_s, dtype=np.float64)
    if np.any(~np.isfinite(t)) or np.any(t < 0):
        raise ValueError(f"period_s must be finite and >= 0 [s]; got {period_s!r}")
    short = (40.7 - 15.0 * t) if vs30_clustering else (8.5 + 17.2 * t)
    return np.where(t < 1.0, short, 22.0 + 3.7 * t)


def jb09_correlation(distance_km: ArrayLike, period_s: ArrayLike, vs30_clustering: bool = False) -> FloatArray:
    r"""Correlation [-] of within-event residuals at separation ``distance_km``.

    :math:`\rho(h) = \exp(-3h/b(T))` with :math:`b(T)` from :func:`jb09_range_km`
    (Jayaram & Baker 2009, exponential model).

    Parameters
    ----------
    distance_km : array_like [km]
        Separation h >= 0.
    period_s : array_like [s]
        Spectral period (0 for PGA); broadcasts with ``distance_km``.
    vs30_clustering : bool
        Case 2 (clustered Vs30) when True.

    Returns
    -------
    ndarray [-]
    """
    h = np.asarray(distance_km, dtype=np.float64)
    if np.any(~np.isfinite(h)) or np.any(h < 0):
        raise ValueError(f"distance_km must be finite and >= 0 [km]; got {distance_km!r}")
    return np.exp(-3.0 * h / jb09_range_km(period_s, vs30_clustering))


def bj08_correlation(period1_s: ArrayLike, period2_s: ArrayLike) -> FloatArray:
    r"""Correlation [-] of ln spectral-acceleration residuals at two periods.

    Parameters
    ----------
    period1_s, period2_s : array_like [s]
        Periods in [0.01, 10] s (use :data:`BJ08_PGA_PERIOD_S` for PGA); broadcast together.

    Returns
    -------
    ndarray [-]
        Exactly 1 where the periods are equal.

    Notes
    -----
    Baker & Jayaram (2008), predictive equation (their Eqs. 5-6 as commonly cited;
    checked against a published reproduction of the formula), with
    :math:`T_{min} = \min(T_1, T_2)`, :math:`T_{max} = \max(T_1, T_2)`:

    .. math::
        C_1 &= 1 - \cos\big(\pi/2 - 0.366 \ln(T_{max}/\max(T_{min}, 0.109))\big) \\
        C_2 &= 1 - 0.105\,\big(1 - \tfrac{1}{1 + e^{100 T_{max} - 5}}\big)
               \tfrac{T_{max} - T_{min}}{T_{max} - 0.0099} \quad (T_{max} < 0.2;\ 0 \text{ otherwise}) \\
        C_3 &= C_2 \text{ if } T_{max} < 0.109, \text{ else } C_1 \\
        C_4 &= C_1 + \tfrac12 (\sqrt{C_3} - C_3)(1 + \cos(\pi T_{min}/0.109))

    and :math:`\rho = C_2` if :math:`T_{max} < 0.109`; :math:`C_1` if
    :math:`T_{min} > 0.109`; :math:`\min(C_2, C_4)` if :math:`T_{max} < 0.2`;
    :math:`C_4` otherwise. The same equation serves between-event, within-event and total
    residuals (the paper found them alike).

    References
    ----------
    Baker & Jayaram (2008), Earthquake Spectra 24(1), 299-317.
    """
    t1 = np.asarray(period1_s, dtype=np.float64)
    t2 = np.asarray(period2_s, dtype=np.float64)
    for name, t, raw in (("period1_s", t1, period1_s), ("period2_s", t2, period2_s)):
        if np.any(~np.isfinite(t)) or np.any(t < _BJ08_MIN_S) or np.any(t > _BJ08_MAX_S):
            raise ValueError(
                f"{name} must lie in [{_BJ08_MIN_S}, {_BJ08_MAX_S}] s, the range of Baker & Jayaram (2008) "
                f"(PGA: {BJ08_PGA_PERIOD_S} s); got {raw!r}"
            )
    tmin = np.minimum(t1, t2)
    tmax = np.maximum(t1, t2)
    c1 = 1.0 - np.cos(np.pi / 2.0 - 0.366 * np.log(tmax / np.maximum(tmin, 0.109)))
    # 1 - 1/(1 + exp(x)) = special.expit(x): no overflow at long periods
    c2 = np.where(tmax < 0.2, 1.0 - 0.105 * special.expit(100.0 * tmax - 5.0) * (tmax - tmin) / (tmax - 0.0099), 0.0)
    c3 = np.where(tmax < 0.109, c2, c1)
    c4 = c1 + 0.5 * (np.sqrt(c3) - c3) * (1.0 + np.cos(np.pi * tmin / 0.109))
    rho = np.select([tmax < 0.109, tmin > 0.109, tmax < 0.2], [c2, c1, np.minimum(c2, c4)], c4)
    return np.where(t1 == t2, 1.0, rho)


def _bj08_period(im: str) -> float:
    t = model_period(im)  # 0.0 for PGA (quakefolio.core.ims)
    return BJ08_PGA_PERIOD_S if t == 0.0 else t


def cross_im_correlation_matrix(ims: Sequence[str]) -> FloatArray:
    """Baker & Jayaram (2008) correlation matrix [-] of a list of IMs.

    Parameters
    ----------
    ims : sequence of str
        ``PGA`` (taken as T = :data:`BJ08_PGA_PERIOD_S`) or ``SA_<T>`` with T in [0.01, 10] s.

    Returns
    -------
    ndarray, shape (n_ims, n_ims)
        Symmetric, unit diagonal (:func:`bj08_correlation` of every pair).
    """
    t = np.array([_bj08_period(im) for im in ims], dtype=np.float64)
    return bj08_correlation(t[:, None], t[None, :])


# --------------------------------------------------------------------------- #
# Truncation and combination
# --------------------------------------------------------------------------- #
def _check_truncation(truncation_sigma):
    if truncation_sigma is None:
        return None
    if isinstance(truncation_sigma, (bool, np.bool_)) or not isinstance(truncation_sigma, numbers.Real) \
            or not (truncation_sigma > 0) or not math.isfinite(truncation_sigma):
        raise ValueError(f"truncation_sigma must be a positive finite number or None; got {truncation_sigma!r}")
    return float(truncation_sigma)


def truncated_normal_transform(z: ArrayLike, truncation_sigma: float | None) -> FloatArray:
    r"""Map standard normals to standard normals truncated to :math:`[-n, n]` [-].

    Parameters
    ----------
    z : array_like [-]
        Standard-normal values (any shape).
    truncation_sigma : float or None
        n > 0; None returns ``z`` unchanged (as a float array).

    Returns
    -------
    ndarray [-], same shape
        :math:`z' = \Phi^{-1}\big(\Phi(-n) + (1 - 2\Phi(-n))\Phi(z)\big)`: if z is N(0, 1),
        z' has the distribution N(0, 1) truncated to [-n, n] (``scipy.stats.truncnorm(-n, n)``),
        and the map is increasing, odd and continuous.

    Notes
    -----
    Inverse-CDF (probability-integral) transform. Evaluated on the lower tail,
    :math:`z' = -\operatorname{sign}(z)\,\Phi^{-1}\big(p_n + (1 - 2p_n)\Phi(-|z|)\big)`,
    :math:`p_n = \Phi(-n)`, which keeps full relative precision for large |z|. The result is
    limited to [-n, n] to remove round-off of the last bit as :math:`z \to \pm\infty`.
    """
    z = np.asarray(z, dtype=np.float64)
    n = _check_truncation(truncation_sigma)
    if n is None:
        return z.copy()
    pn = special.ndtr(-n)
    out = special.ndtr(-np.abs(z))
    out *= 1.0 - 2.0 * pn
    out += pn
    out = special.ndtri(out)
    np.negative(out, out=out)  # >= 0
    np.minimum(out, n, out=out)
    return np.copysign(out, z)


def ln_im(ln_median: ArrayLike, tau: ArrayLike, phi: ArrayLike, eta: ArrayLike, eps: ArrayLike,
          truncation_sigma: float | None = None) -> FloatArray:
    r"""ln IM [ln g] of sampled fields: :math:`\mu + \tau\eta + \phi\varepsilon`.

    Parameters
    ----------
    ln_median : array_like [ln g]
        Median ln IM, broadcastable to (n_events, n_ims, n_sites).
    tau : array_like [ln units]
        Between-event standard deviation, >= 0, broadcastable to (n_events, n_ims, n_sites).
    phi : array_like [ln units]
        Within-event standard deviation, >= 0, broadcastable to (n_events, n_ims, n_sites).
    eta : array_like, shape (n_events, n_ims) [-]
        Standard-normal between-event residuals (:class:`Residuals`).
    eps : array_like, shape (n_events, n_ims, n_sites) [-]
        Standard-normal within-event residual fields (:class:`Residuals`).
    truncation_sigma : float or None
        Symmetric truncation n of the total normalised residual, as in the classical engine;
        None (default) for none.

    Returns
    -------
    ndarray, shape (n_events, n_ims, n_sites) [ln g]

    Notes
    -----
    With truncation, the total normalised residual
    :math:`e = (\tau\eta + \phi\varepsilon)/\sigma`, :math:`\sigma = \sqrt{\tau^2 + \phi^2}`,
    is replaced by :func:`truncated_normal_transform` of it, so that every simulated
    :math:`\ln IM` has exactly the truncated lognormal marginal of
    :func:`quakefolio.core.hazard.exceedance_probability` (module notes). Where
    :math:`\sigma = 0` the result is the median.
    """
    mu = np.asarray(ln_median, dtype=np.float64)
    tau = np.asarray(tau, dtype=np.float64)
    phi = np.asarray(phi, dtype=np.float64)
    eta = np.asarray(eta, dtype=np.float64)
    eps = np.asarray(eps, dtype=np.float64)
    n = _check_truncation(truncation_sigma)
    if eta.ndim != 2 or eps.ndim != 3 or eps.shape[:2] != eta.shape:
        raise ValueError(
            "eta must have shape (n_events, n_ims) and eps (n_events, n_ims, n_sites) with the same first two "
            f"axes; got {eta.shape} and {eps.shape}"
        )
    check_standard_deviations(tau, phi)
    return mu + residual_term(tau, phi, eta, eps, n)


def check_standard_deviations(tau, phi) -> None:
    """Raise ``ValueError`` unless ``tau`` and ``phi`` [ln units] are finite and >= 0 (two reductions each)."""
    for name, sd in (("tau", tau), ("phi", phi)):
        if sd.size and not (sd.min() >= 0 and np.isfinite(sd.max())):  # NaN fails both comparisons
            raise ValueError(f"{name} must be finite and >= 0 [ln units]")


def residual_term(tau: FloatArray, phi: FloatArray, eta: FloatArray, eps: FloatArray,
                  truncation_sigma: float | None) -> FloatArray:
    r"""The residual part of :func:`ln_im` [ln units]: :math:`\tau\eta + \phi\varepsilon`, truncated.

    Parameters
    ----------
    tau, phi : ndarray, shape (n_events, n_ims, n_sites) [ln units]
        Checked by the caller (finite, >= 0).
    eta : ndarray, shape (n_events, n_ims) [-]
    eps : ndarray, shape (n_events, n_ims, n_sites) [-]
    truncation_sigma : float or None
        As :func:`ln_im`.

    Returns
    -------
    ndarray, shape (n_events, n_ims, n_sites) [ln units]
        :math:`\sigma\,T_n((\tau\eta + \phi\varepsilon)/\sigma)` with :math:`T_n`
        :func:`truncated_normal_transform` (0 where :math:`\sigma = 0`), or the untruncated
        sum; the operations of :func:`ln_im` in the same order, in place where possible.
    """
    n = _check_truncation(truncation_sigma)
    total = _sum(tau * eta[:, :, None], phi * eps)
    if n is None:
        return total
    sigma = np.sqrt(_sum(tau * tau, phi * phi))
    e = np.zeros(np.broadcast_shapes(total.shape, sigma.shape))
    np.divide(total, sigma, out=e, where=sigma > 0)
    total = truncated_normal_transform(e, n)
    total *= sigma
    return total


def _sum(a: FloatArray, b: FloatArray) -> FloatArray:
    """``a + b``, into ``a`` when it has the broadcast shape."""
    if isinstance(a, np.ndarray) and a.shape == np.broadcast_shapes(a.shape, np.shape(b)):
        a += b
        return a
    return a + b


# --------------------------------------------------------------------------- #
# Sampler
# --------------------------------------------------------------------------- #
class Residuals(NamedTuple):
    """Sampled standard-normal residuals of a chunk of events.

    Attributes
    ----------
    eta : ndarray, shape (n_events, n_ims) [-]
        Between-event residuals, correlated across IMs.
    eps : ndarray, shape (n_events, n_ims, n_sites) [-]
        Within-event residual fields, in the order of the sampler's input sites.
    """

    eta: FloatArray
    eps: FloatArray


def _psd_root(m: FloatArray) -> FloatArray:
    """Symmetric square root of a symmetric positive semi-definite matrix (negative round-off -> 0)."""
    w, u = np.linalg.eigh(0.5 * (m + m.T))
    return (u * np.sqrt(np.clip(w, 0.0, None))) @ u.T


def _lower_factor(r: FloatArray) -> FloatArray:
    """Cholesky factor of a small correlation matrix; a re-normalised eigen root if not positive definite."""
    try:
        return np.linalg.cholesky(r)
    except np.linalg.LinAlgError:
        a = _psd_root(r)
        return a / np.sqrt(np.sum(a * a, axis=1))[:, None]


class FieldSampler:
    r"""Sampler of correlated between- and within-event residuals for one site set.

    Construct once per site set (cost: the distance matrix and one factorisation per
    distinct range, see the module notes); then :meth:`sample` or
    :meth:`sample_event_blocks` for chunks of events.

    Parameters
    ----------
    site_lon, site_lat : array_like, shape (n_sites,) [deg]
        Site coordinates (WGS84). Repeated locations are one site internally (their
        fields are identical).
    ims : sequence of str
        IM names (``PGA``, ``SA_<T>``), the order of the IM axis of every output.
    spatial_correlation : bool
        False: within-event residuals independent between sites.
    cross_im_correlation : bool
        False: residuals independent between IMs (identity instead of Baker & Jayaram 2008).
    vs30_clustering : bool
        Range model case of Jayaram & Baker (2009): False for case 1 (no Vs30 clustering),
        True for case 2.
    range_km : None, float, sequence of float or mapping {im: float}
        Override of the range b [km] (> 0; ``inf`` for perfect correlation within an event),
        for all IMs (float), per IM in order (sequence) or for some IMs (mapping); None uses
        :func:`jb09_range_km`.
    dense_max_sites : int
        Unique-site count up to which the dense (Cholesky) route is used
        (default :data:`DENSE_MAX_SITES`).
    eigen_variance_share : float
        Share of variance kept by the eigen route, in (0, 1] (default
        :data:`EIGEN_VARIANCE_SHARE`).

    Attributes
    ----------
    ims : tuple of str
    n_sites : int
        Number of input sites.
    n_unique_sites : int
    site_index : ndarray of int64, shape (n_sites,)
        Unique-site index of every input site.
    range_km : ndarray, shape (n_ims,) [km]
        Range used per IM (``inf`` where overridden so; meaningless when spatial correlation is off).
    cross_im_matrix : ndarray, shape (n_ims, n_ims) [-]
        IM correlation used (identity when cross-IM correlation is off).
    method : str
        ``"independent"``, ``"dense"`` or ``"eigen"``.
    rank : int
        Number of white-noise components per IM and event (n_unique_sites except on the eigen route).
    variance_share : ndarray, shape (n_ims,) [-]
        Share of :math:`\operatorname{tr} C_k` kept before the per-site re-normalisation
        (1 on the dense and independent routes).
    """

    def __init__(self, site_lon: ArrayLike, site_lat: ArrayLike, ims: Sequence[str], *,
                 spatial_correlation: bool = True, cross_im_correlation: bool = True,
                 vs30_clustering: bool = False, range_km=None,
                 dense_max_sites: int = DENSE_MAX_SITES,
                 eigen_variance_share: float = EIGEN_VARIANCE_SHARE):
        lon = np.asarray(site_lon, dtype=np.float64).ravel()
        lat = np.asarray(site_lat, dtype=np.float64).ravel()
        if lon.shape != lat.shape:
            raise ValueError(f"site_lon and site_lat must have one length; got {lon.size} and {lat.size}")
        if lon.size == 0:
            raise ValueError("FieldSampler needs at least one site")
        if isinstance(ims, str) or len(ims) == 0:
            raise ValueError(f"ims must be a non-empty sequence of IM names; got {ims!r}")
        self.ims = tuple(ims)
        if len(set(self.ims)) != len(self.ims):
            raise ValueError(f"ims must not repeat a name; got {self.ims}")
        periods = np.array([model_period(im) for im in self.ims], dtype=np.float64)  # PGA: 0.0
        if not (0.0 < eigen_variance_share <= 1.0):
            raise ValueError(f"eigen_variance_share must lie in (0, 1]; got {eigen_variance_share!r}")
        if isinstance(dense_max_sites, (bool, np.bool_)) or not isinstance(dense_max_sites, numbers.Integral) \
                or dense_max_sites < 0:
            raise ValueError(f"dense_max_sites must be a non-negative integer; got {dense_max_sites!r}")

        # unique sites, in order of first appearance
        coords = np.stack([lon, lat], axis=1)
        _, first, inverse = np.unique(coords, axis=0, return_index=True, return_inverse=True)
        order = np.argsort(first, kind="stable")
        rank_of = np.empty_like(order)
        rank_of[order] = np.arange(order.size)
        self.site_index = rank_of[inverse.ravel()].astype(np.int64)
        ulon, ulat = lon[first[order]], lat[first[order]]
        self.n_sites = int(lon.size)
        self.n_unique_sites = int(ulon.size)
        self._identity_index = self.n_unique_sites == self.n_sites  # then site_index == arange

        self.range_km = self._resolve_ranges(periods, vs30_clustering, range_km)
        self.spatial_correlation = bool(spatial_correlation)
        self.cross_im_correlation = bool(cross_im_correlation)
        n_ims = len(self.ims)
        if self.cross_im_correlation:
            self.cross_im_matrix = cross_im_correlation_matrix(self.ims)
        else:
            self.cross_im_matrix = np.eye(n_ims)
        self._cross_factor = _lower_factor(self.cross_im_matrix)

        n = self.n_unique_sites
        self._factors: list[FloatArray | None] = [None] * n_ims
        self.variance_share = np.ones(n_ims)
        if not self.spatial_correlation or n == 1:
            self.method, self.rank = "independent", n
            return
        if n > EIGEN_MAX_SITES:
            raise ValueError(
                f"FieldSampler: {n} unique sites exceed EIGEN_MAX_SITES = {EIGEN_MAX_SITES}; split the "
                "portfolio into regions or snap assets to a coarser site grid"
            )
        x, y = aeqd_forward(ulon, ulat, *mean_position(ulon, ulat))
        dist = self._distance_matrix(np.asarray(x), np.asarray(y))
        if n <= dense_max_sites and self._dense(dist):
            self.method, self.rank = "dense", n
        else:
            share = eigen_variance_share if n > dense_max_sites else 1.0  # 1.0: fallback of the dense route
            self._eigen(dist, share)
            self.method = "eigen"

    # ---------------------------------------------------------------- setup
    def _resolve_ranges(self, periods, vs30_clustering, range_km) -> FloatArray:
        b = np.array(jb09_range_km(periods, vs30_clustering), dtype=np.float64)
        if range_km is None:
            return b
        if isinstance(range_km, Mapping):
            unknown = set(range_km) - set(self.ims)
            if unknown:
                raise ValueError(f"range_km names IMs not sampled: {sorted(unknown)}; IMs are {list(self.ims)}")
            for i, im in enumerate(self.ims):
                if im in range_km:
                    b[i] = float(range_km[im])
        elif np.ndim(range_km) == 0:
            b[:] = float(range_km)
        else:
            vals = np.asarray(range_km, dtype=np.float64).ravel()
            if vals.size != b.size:
                raise ValueError(f"range_km must give one range per IM ({b.size}); got {vals.size}")
            b[:] = vals
        if np.any(np.isnan(b)) or np.any(b <= 0):
            raise ValueError(f"range_km must be > 0 [km] (inf allowed); got {b.tolist()}")
        return b

    @staticmethod
    def _distance_matrix(x: FloatArray, y: FloatArray) -> FloatArray:
        n = x.size
        d = np.empty((n, n))
        for i0 in range(0, n, _ROW_CHUNK):
            i1 = min(n, i0 + _ROW_CHUNK)
            np.hypot(x[i0:i1, None] - x[None, :], y[i0:i1, None] - y[None, :], out=d[i0:i1])
        return d

    @staticmethod
    def _correlation(dist_rows: FloatArray, b: float) -> FloatArray:
        c = dist_rows * (-3.0 / b)  # b = inf gives -0.0: perfect correlation
        np.exp(c, out=c)
        return c

    def _distinct_ranges(self):
        """Map each distinct range to the IM positions using it."""
        groups: dict[float, list[int]] = {}
        for k, b in enumerate(self.range_km):
            groups.setdefault(float(b), []).append(k)
        return groups

    def _dense(self, dist: FloatArray) -> bool:
        """Cholesky factor per distinct range; False if any factorisation fails."""
        factors = {}
        for b in self._distinct_ranges():
            try:
                factors[b] = sla.cholesky(self._correlation(dist, b), lower=True, overwrite_a=True,
                                          check_finite=False)
            except np.linalg.LinAlgError:
                return False
        for b, ks in self._distinct_ranges().items():
            for k in ks:
                self._factors[k] = factors[b]
        return True

    def _eigen(self, dist: FloatArray, share: float) -> None:
        """Common truncated eigenbasis of the shortest-range matrix; one factor per distinct range."""
        n = dist.shape[0]
        groups = self._distinct_ranges()
        b_ref = min(groups)
        c_ref = self._correlation(dist, b_ref)
        w = sla.eigh(c_ref, eigvals_only=True, check_finite=False)[::-1]  # descending
        tol = 10.0 * n * np.finfo(np.float64).eps * max(w[0], 1.0)
        n_num = max(1, int(np.count_nonzero(w > tol)))  # numerical rank
        if share >= 1.0:
            r = n_num
        else:
            r = int(np.searchsorted(np.cumsum(w) / n, share) + 1)
            r = min(max(r, 1), n_num)
        while True:
            w_sub, v = sla.eigh(c_ref, subset_by_index=[n - r, n - 1], check_finite=False)
            v = v[:, ::-1]
            w_sub = w_sub[::-1]
            projected = {}
            for b in groups:
                if b == b_ref:
                    projected[b] = np.diag(w_sub)
                    continue
                cv = np.empty((n, r))
                for i0 in range(0, n, _ROW_CHUNK):  # (C_b V) without a second n x n matrix
                    i1 = min(n, i0 + _ROW_CHUNK)
                    cv[i0:i1] = self._correlation(dist[i0:i1], b) @ v
                m = v.T @ cv
                projected[b] = 0.5 * (m + m.T)
            shares = {b: float(np.trace(m)) / n for b, m in projected.items()}
            if share >= 1.0 or r >= n_num or min(shares.values()) >= share:
                break
            r = min(n_num, max(r + 1, int(math.ceil(1.25 * r))))
        del c_ref
        for b, ks in groups.items():
            lk = v @ _psd_root(projected[b])
            kept = np.sum(lk * lk, axis=1)  # variance kept at each site
            lk /= np.sqrt(kept)[:, None]
            for k in ks:
                self._factors[k] = lk
                self.variance_share[k] = shares[b]
        self.rank = r

    # ---------------------------------------------------------------- sampling
    def _draw(self, rng: np.random.Generator, n_events: int):
        zeta = rng.standard_normal((n_events, len(self.ims)))
        z = rng.standard_normal((len(self.ims), n_events, self.rank))
        return zeta, z

    def _mix_ims(self, a: FloatArray, axis_values) -> None:
        """In place: component k <- sum_{l<=k} A[k, l] component l (elementwise, order fixed)."""
        A = self._cross_factor
        for k in reversed(range(A.shape[0])):
            comp = axis_values(k)
            comp *= A[k, k]
            for l in range(k):
                if A[k, l] != 0.0:
                    comp += A[k, l] * axis_values(l)

    def _transform(self, zeta: FloatArray, z: FloatArray, block_size: int) -> Residuals:
        n_events = zeta.shape[0]
        n_ims = len(self.ims)
        self._mix_ims(zeta, lambda k: zeta[:, k])
        self._mix_ims(z, lambda k: z[k])
        n_u = self.n_unique_sites
        eps = np.empty((n_events, n_ims, n_u))
        n_full = n_events // block_size
        cut = n_full * block_size
        for k in range(n_ims):
            lk = self._factors[k]
            if lk is None:
                eps[:, k, :] = z[k]
                continue
            # one stacked product per IM: each block's product has the same shape whatever the chunk
            if n_full:
                eps[:cut, k, :] = np.matmul(z[k, :cut].reshape(n_full, block_size, self.rank),
                                            lk.T).reshape(cut, n_u)
            if cut < n_events:
                eps[cut:, k, :] = np.matmul(z[k, cut:][None], lk.T)[0]
        if not self._identity_index:
            eps = eps[:, :, self.site_index]
        return Residuals(zeta, eps)

    def sample(self, rng: np.random.Generator, n_events: int) -> Residuals:
        """Residuals of ``n_events`` events from one generator.

        Parameters
        ----------
        rng : numpy.random.Generator
        n_events : int
            Number of events, >= 0.

        Returns
        -------
        Residuals
            ``eta`` (n_events, n_ims) and ``eps`` (n_events, n_ims, n_sites), standard normal.

        Notes
        -----
        Draws, in this order, ``n_events x n_ims`` normals for eta and
        ``n_ims x n_events x rank`` for the within-event white noise. For results that do not
        depend on how events are chunked, use :meth:`sample_event_blocks`.
        """
        if isinstance(n_events, (bool, np.bool_)) or not isinstance(n_events, numbers.Integral) or n_events < 0:
            raise ValueError(f"n_events must be a non-negative integer; got {n_events!r}")
        zeta, z = self._draw(rng, int(n_events))
        return self._transform(zeta, z, EVENT_BLOCK_SIZE)

    def sample_event_blocks(self, seed: int, n_events: int, block_indices: ArrayLike) -> Residuals:
        """Residuals of whole event blocks, each drawn from its own generator.

        Parameters
        ----------
        seed : int
            The run's non-negative seed.
        n_events : int
            Number of events of the whole event set (defines the blocks, :func:`event_blocks`).
        block_indices : array_like of int
            Strictly increasing global block indices to sample.

        Returns
        -------
        Residuals
            For the events of the listed blocks, concatenated in order: ``eta``
            (m, n_ims), ``eps`` (m, n_ims, n_sites).

        Notes
        -----
        Block b draws from :func:`~quakefolio.core.events.eventset.block_rng` ``(seed, b)`` exactly
        as :meth:`sample` would for its events, and every block's matrix product has the
        same shape whatever the other blocks of the call, so **the residuals of an event are
        identical whatever grouping of whole blocks into tasks is used** (deterministic for
        a seed whatever the chunking; bitwise on a given machine and BLAS library).
        """
        seed = check_seed(seed)
        blocks = event_blocks(n_events, EVENT_BLOCK_SIZE)
        idx = np.asarray(block_indices)
        if idx.ndim != 1 or (idx.size and not np.issubdtype(idx.dtype, np.integer)):
            raise ValueError(f"block_indices must be a 1-D array of integers; got {block_indices!r}")
        if idx.size and (np.any(np.diff(idx) <= 0) or idx[0] < 0 or idx[-1] >= len(blocks)):
            raise ValueError(
                f"block_indices must be strictly increasing and in [0, {len(blocks) - 1}]; got {idx.tolist()}"
            )
        sizes = [int(blocks[b, 1] - blocks[b, 0]) for b in idx]
        draws = [self._draw(block_rng(seed, int(b)), m) for b, m in zip(idx, sizes)]
        if draws:
            zeta = np.concatenate([d[0] for d in draws], axis=0)
            z = np.concatenate([d[1] for d in draws], axis=1)
        else:
            zeta, z = np.empty((0, len(self.ims))), np.empty((len(self.ims), 0, self.rank))
        return self._transform(zeta, z, EVENT_BLOCK_SIZE)

    # ---------------------------------------------------------------- diagnostics
    def implied_correlation(self, im: str) -> FloatArray:
        """Within-event correlation matrix [-] between unique sites implied by the factor of ``im``.

        Equals the Jayaram & Baker (2009) matrix on the dense route (to round-off), the
        re-normalised truncated one on the eigen route, the identity when spatial
        correlation is off. Costs O(n_unique_sites^2 x rank).
        """
        k = self._im_position(im)
        lk = self._factors[k]
        if lk is None:
            return np.eye(self.n_unique_sites)
        return lk @ lk.T

    def colocated_cross_im_correlation(self) -> tuple[FloatArray, FloatArray]:
        r"""Cross-IM correlation [-] of within-event residuals at one site, as sampled.

        Returns
        -------
        mean, lowest : ndarray, shape (n_ims, n_ims)
            :math:`R_{kl}` times the mean and the minimum over unique sites of the attenuation
            :math:`c_{kl,i} = (L_k L_l^T)_{ii}` (module notes): equal to the Baker & Jayaram
            (2008) value where ranges coincide or spatial correlation is off, attenuated
            otherwise.
        """
        n_ims = len(self.ims)
        mean = np.array(self.cross_im_matrix, dtype=np.float64, copy=True)
        low = mean.copy()
        for k in range(n_ims):
            for l in range(k + 1, n_ims):
                lk, ll = self._factors[k], self._factors[l]
                if lk is None or lk is ll:
                    c = np.ones(1)
                else:
                    c = np.einsum("ij,ij->i", lk, ll)
                mean[k, l] = mean[l, k] = self.cross_im_matrix[k, l] * float(np.mean(c))
                low[k, l] = low[l, k] = self.cross_im_matrix[k, l] * float(np.min(c))
        return mean, low

    def _im_position(self, im: str) -> int:
        try:
            return self.ims.index(im)
        except ValueError:
            raise ValueError(f"IM {im!r} is not sampled; IMs are {list(self.ims)}") from None
