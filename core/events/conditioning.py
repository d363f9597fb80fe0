r"""Ground-motion fields conditioned on recorded intensities at stations.

For one rupture, one ground-motion model and one IM, the total residual of
:math:`\ln IM` at a point is :math:`\delta = \tau\eta + \phi\varepsilon` (:mod:`quakefolio.core.events.gmf`):
:math:`\eta` the standard-normal between-event residual shared by every point,
:math:`\varepsilon` the standard-normal within-event residual field with spatial correlation
matrix :math:`R` (Jayaram & Baker 2009). A station records :math:`\ln y_s`; its observed total
residual is :math:`r_s = \ln y_s - \mu_s` with a measurement error :math:`e_s \sim N(0, \sigma_{m,s}^2)`:

.. math:: r_s = \tau_s\,\eta + \phi_s\,\varepsilon_s + e_s.

Method (Worden, Thompson, Baker, Bradley, Luco & Wald 2018, in two steps)
-------------------------------------------------------------------------
With :math:`\Sigma_w = \Phi_s R_{ss} \Phi_s + \operatorname{diag}(\sigma_m^2)` the covariance of
the within-event part plus measurement error at the stations (:math:`\Phi = \operatorname{diag}(\phi)`):

1. **Between-event residual** (the event's bias, a generalised-least-squares estimate with the
   standard-normal prior of :math:`\eta`): :math:`\eta \mid r_s \sim N(\hat\eta, v)` with

   .. math:: v = \big(1 + \tau_s^T \Sigma_w^{-1} \tau_s\big)^{-1},\qquad
             \hat\eta = v\, \tau_s^T \Sigma_w^{-1} r_s.

2. **Within-event residuals at the targets**, given :math:`\eta`, by the conditional multivariate
   normal of :math:`\varepsilon_t` given the bias-removed station residuals
   :math:`w_s = r_s - \tau_s\eta = \Phi_s\varepsilon_s + e_s`:

   .. math:: \varepsilon_t \mid w_s \sim N\big(G w_s,\; R_{tt} - G\,\Phi_s R_{st}\big),
             \qquad G = R_{ts}\Phi_s\Sigma_w^{-1}.

Sampling draws :math:`\eta = \hat\eta + \sqrt{v}\,\zeta` and then
:math:`\varepsilon_t = G(r_s - \tau_s\eta) + S z` with :math:`S S^T` the conditional covariance of
step 2 (symmetric square root from its eigen-decomposition, zero eigenvalues kept as zero, so a
target on a station with :math:`\sigma_m = 0` has zero conditional variance). The two steps are
exact: integrating step 2 over the posterior of step 1 gives the joint Gaussian conditional of
:math:`(\eta, \varepsilon_t)` given :math:`r_s` (checked against the one-step conditional of the
full covariance in the tests). Consequences:

* at a station with :math:`\sigma_m = 0` (and the station's own :math:`\mu, \tau, \phi`), every
  realisation reproduces the record: :math:`\mu_s + \tau_s\eta + \phi_s\varepsilon_s = \ln y_s`;
* far from every station (:math:`R_{ts} \to 0`) the within-event residual returns to
  :math:`N(0, 1)`; the between-event residual stays the event's estimate, so
  :math:`\ln IM \sim N(\mu + \tau\hat\eta,\; \tau^2 v + \phi^2)` there;
* without stations the field is the unconditioned one.

Limits: one IM at a time (stations of another IM do not inform it; cross-IM conditioning is
not done), conditioned fields are not truncated, and the station Vs30 enters through
:math:`\mu_s, \tau_s, \phi_s` only.

References
----------
Worden, C. B., Thompson, E. M., Baker, J. W., Bradley, B. A., Luco, N., Wald, D. J. (2018).
Spatial and spectral interpolation of ground-motion intensity measure observations. Bulletin
of the Seismological Society of America 108(2), 866-875. doi:10.1785/0120170201.
Jayaram, N., Baker, J. W. (2009). Correlation model for spatially distributed ground-motion
intensities. Earthquake Engineering & Structural Dynamics 38(15), 1687-1708.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

from quakefolio.core.lazy import lazy_module
from numpy.typing import ArrayLike, NDArray

sla = lazy_module("scipy.linalg")

__all__ = ["ConditionedField", "condition_field", "sample_conditioned"]

FloatArray = NDArray[np.float64]


class ConditionedField(NamedTuple):
    r"""Conditional distribution of one IM's residuals given station records.

    Attributes
    ----------
    eta_mean : float [-]
        :math:`\hat\eta`, posterior mean of the between-event residual.
    eta_var : float [-]
        :math:`v`, its posterior variance (1 without stations).
    gain : ndarray, shape (n_targets, n_stations) [1/ln units]
        :math:`G = R_{ts}\Phi_s\Sigma_w^{-1}`.
    station_residual : ndarray, shape (n_stations,) [ln units]
        :math:`r_s`.
    station_tau : ndarray, shape (n_stations,) [ln units]
    root : ndarray, shape (n_targets, n_targets) [-]
        :math:`S` with :math:`S S^T = R_{tt} - G\Phi_s R_{st}`.
    """

    eta_mean: float
    eta_var: float
    gain: FloatArray
    station_residual: FloatArray
    station_tau: FloatArray
    root: FloatArray

    def eps_mean(self, eta: ArrayLike) -> FloatArray:
        r"""Conditional mean of :math:`\varepsilon_t` [-] for given ``eta``, shape (n, n_targets)."""
        eta = np.atleast_1d(np.asarray(eta, dtype=np.float64))
        w = self.station_residual[None, :] - eta[:, None] * self.station_tau[None, :]
        return w @ self.gain.T


def _vector(name, x, n=None, *, non_negative=False):
    a = np.asarray(x, dtype=np.float64).ravel()
    if n is not None and a.size != n:
        raise ValueError(f"{name} must have {n} values; got {a.size}")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} must be finite")
    if non_negative and np.any(a < 0):
        raise ValueError(f"{name} must be >= 0; got min {a.min()!r}")
    return a


def _psd_root(m: FloatArray) -> FloatArray:
    """Symmetric square root of a symmetric positive semi-definite matrix.

    Eigenvalues below ``10 n eps max|w|`` are round-off of zero (Golub & Van Loan 2013, the
    backward error of the symmetric eigenproblem) and taken as 0, so a direction of zero
    conditional variance (a target on an exact station) keeps exactly none.
    """
    if m.size == 0:
        return np.zeros_like(m)
    w, u = np.linalg.eigh(0.5 * (m + m.T))
    tol = 10.0 * m.shape[0] * np.finfo(np.float64).eps * max(float(np.max(np.abs(w))), 1.0)
    return (u * np.sqrt(np.where(w > tol, w, 0.0))) @ u.T


def condition_field(station_residual: ArrayLike, station_tau: ArrayLike, station_phi: ArrayLike,
                    measurement_sd: ArrayLike, rho_ss: ArrayLike, rho_ts: ArrayLike,
                    rho_tt: ArrayLike) -> ConditionedField:
    r"""Conditional distribution of the residuals of one IM given station records.

    Parameters
    ----------
    station_residual : array_like, shape (n_s,) [ln units]
        :math:`r_s = \ln y_s - \mu_s`, observed minus model median, natural log.
    station_tau, station_phi : array_like, shape (n_s,) [ln units]
        Between- and within-event standard deviations of the model at the stations; phi > 0.
    measurement_sd : array_like, shape (n_s,) or scalar [ln units]
        :math:`\sigma_m`, standard deviation of each record's measurement error, >= 0.
    rho_ss : array_like, shape (n_s, n_s) [-]
        Within-event correlation between the stations.
    rho_ts : array_like, shape (n_t, n_s) [-]
        Between targets and stations.
    rho_tt : array_like, shape (n_t, n_t) [-]
        Between targets.

    Returns
    -------
    ConditionedField

    Raises
    ------
    ValueError
        On shapes that disagree, non-finite values, phi <= 0, or station residuals whose
        covariance :math:`\Sigma_w` is singular (two stations at one point without a
        measurement error).

    Notes
    -----
    Worden et al. (2018), module notes: :math:`v = (1 + \tau_s^T\Sigma_w^{-1}\tau_s)^{-1}`,
    :math:`\hat\eta = v\,\tau_s^T\Sigma_w^{-1} r_s`, :math:`G = R_{ts}\Phi_s\Sigma_w^{-1}`,
    conditional within-event covariance :math:`R_{tt} - G\Phi_s R_{st}`.
    """
    r = _vector("station_residual", station_residual)
    n_s = r.size
    tau = _vector("station_tau", station_tau, n_s, non_negative=True)
    phi = _vector("station_phi", station_phi, n_s, non_negative=True)
    if np.any(phi <= 0):
        raise ValueError("station_phi must be > 0 [ln units]")
    sd = _vector("measurement_sd", np.broadcast_to(np.asarray(measurement_sd, dtype=np.float64), (n_s,)), n_s,
                 non_negative=True)
    rss = np.asarray(rho_ss, dtype=np.float64)
    rtt = np.asarray(rho_tt, dtype=np.float64)
    rts = np.asarray(rho_ts, dtype=np.float64).reshape(rtt.shape[0] if rtt.ndim == 2 else -1, n_s)
    n_t = rts.shape[0]
    if rss.shape != (n_s, n_s) or rtt.shape != (n_t, n_t):
        raise ValueError(f"rho_ss must be ({n_s}, {n_s}) and rho_tt ({n_t}, {n_t}); got {rss.shape}, {rtt.shape}")
    if n_s == 0:
        return ConditionedField(0.0, 1.0, np.zeros((n_t, 0)), r, tau, _psd_root(rtt))
    sigma_w = phi[:, None] * rss * phi[None, :] + np.diag(sd * sd)
    try:
        factor = sla.cho_factor(sigma_w, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        raise ValueError("station residual covariance is singular: two stations at one point without a "
                         "measurement error") from None
    a_tau = sla.cho_solve(factor, tau, check_finite=False)
    a_r = sla.cho_solve(factor, r, check_finite=False)
    v = 1.0 / (1.0 + float(tau @ a_tau))
    eta_mean = v * float(tau @ a_r)
    gain = sla.cho_solve(factor, (rts * phi[None, :]).T, check_finite=False).T  # R_ts Phi_s Sigma_w^-1
    cov = rtt - gain @ (phi[:, None] * rts.T)
    return ConditionedField(eta_mean, v, gain, r, tau, _psd_root(cov))


def sample_conditioned(field: ConditionedField, rng: np.random.Generator, n: int) -> tuple[FloatArray, FloatArray]:
    r"""Draw ``n`` realisations of :math:`\eta` and :math:`\varepsilon_t` from a conditioned field.

    Parameters
    ----------
    field : ConditionedField
        From :func:`condition_field`.
    rng : numpy.random.Generator
    n : int
        Number of realisations, >= 0.

    Returns
    -------
    eta : ndarray, shape (n,) [-]
        :math:`\hat\eta + \sqrt{v}\,\zeta`.
    eps : ndarray, shape (n, n_targets) [-]
        :math:`G(r_s - \tau_s\eta) + S z`.

    Notes
    -----
    Draws, in this order, ``n`` normals for :math:`\zeta` and ``n x n_targets`` for :math:`z`
    (module notes).
    """
    n = int(n)
    if n < 0:
        raise ValueError(f"n must be >= 0; got {n}")
    zeta = rng.standard_normal(n)
    z = rng.standard_normal((n, field.root.shape[0]))
    eta = field.eta_mean + np.sqrt(field.eta_var) * zeta
    eps = field.eps_mean(eta) + z @ field.root.T
    return eta, eps
