r"""Magnitude-frequency distributions (MFDs) as binned annual rates.

Every distribution here returns :class:`MagnitudeBins`: bin centres [Mw] and the
annual rate [1/yr] of events whose magnitude falls in each bin. Bins are
contiguous, of equal width, and cover ``[mmin, mmax]`` exactly; a bin's rate is the
exact integral of the rate density over the bin (differences of the cumulative
distribution at the bin edges), never a density sampled at the centre, so the bin
rates sum to the total rate of the distribution whatever the bin width.

Distributions
-------------
:func:`truncated_gr`
    Doubly truncated Gutenberg-Richter (exponential) distribution
    (Cosentino, Ficarra & Luzio 1977).
:func:`characteristic_yc85`
    Characteristic-earthquake distribution (Youngs & Coppersmith 1985).
:func:`single_magnitude`
    One magnitude with a given rate.

Moment balancing
----------------
:func:`moment_rate_from_slip` gives the moment rate :math:`\dot M_0 = \mu A \dot s`
of a fault; :func:`moment_balanced` scales any MFD so that
:math:`\sum_i \lambda_i M_0(m_i) = \dot M_0` with the seismic moment from
:func:`seismic_moment_nm` (Hanks & Kanamori 1979). The balance is made on the
binned MFD (moment of each bin taken at its centre magnitude), so the ruptures
the hazard engine sees release exactly the stated moment rate.
"""
from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "MagnitudeBins",
    "HK79_MOMENT_CONSTANT",
    "IASPEI_MOMENT_CONSTANT",
    "YC85_BOX_WIDTH",
    "YC85_BOX_OFFSET",
    "truncated_gr",
    "characteristic_yc85",
    "single_magnitude",
    "seismic_moment_nm",
    "moment_rate_from_slip",
    "mfd_moment_rate",
    "moment_balanced",
]

FloatArray = NDArray[np.float64]

#: ``log10 M0 [N m] = 1.5 Mw + 9.05``: Hanks & Kanamori (1979), eq. 7 (numbering from memory),
#: ``Mw = (2/3) log10 M0 [dyne cm] - 10.7``, rewritten for N m (1 N m = 1e7 dyne cm).
HK79_MOMENT_CONSTANT = 9.05
#: ``log10 M0 [N m] = 1.5 Mw + 9.1``: the rounded form of the same relation adopted
#: as a standard by IASPEI (2013) (common practice).
IASPEI_MOMENT_CONSTANT = 9.1

#: Width [magnitude units] of the uniform "characteristic" box, Youngs & Coppersmith
#: (1985) (their Delta m_2 = 0.5).
YC85_BOX_WIDTH = 0.5
#: The box height equals the exponential density this many magnitude units below the
#: lower edge of the box, Youngs & Coppersmith (1985) (their Delta m_1 = 1.0).
YC85_BOX_OFFSET = 1.0

_LN10 = math.log(10.0)


class MagnitudeBins(NamedTuple):
    """A binned magnitude-frequency distribution.

    Attributes
    ----------
    mag : ndarray, shape (n_bins,) [Mw]
        Bin centres, increasing.
    rate : ndarray, shape (n_bins,) [1/yr]
        Annual rate of events in each bin, >= 0.
    """

    mag: FloatArray
    rate: FloatArray

    @property
    def total_rate(self) -> float:
        """Sum of the bin rates [1/yr]."""
        return float(np.sum(self.rate))


# --------------------------------------------------------------------------- #
# argument checks
# --------------------------------------------------------------------------- #
def _finite(name: str, value) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a number; got {value!r}") from exc
    if not math.isfinite(v):
        raise ValueError(f"{name} must be finite; got {value!r}")
    return v


def _positive(name: str, value) -> float:
    v = _finite(name, value)
    if not v > 0.0:
        raise ValueError(f"{name} must be > 0; got {value!r}")
    return v


def _non_negative(name: str, value) -> float:
    v = _finite(name, value)
    if not v >= 0.0:
        raise ValueError(f"{name} must be >= 0; got {value!r}")
    return v


def _moment_constant(value) -> float:
    c = _finite("moment_constant", value)
    if not 9.0 <= c <= 9.2:
        raise ValueError(
            "moment_constant must be the additive constant of log10 M0 [N m] = 1.5 Mw + c, "
            f"9.05 (Hanks & Kanamori 1979) or 9.1 (IASPEI); got {value!r}"
        )
    return c


def _bin_edges(mmin: float, mmax: float, bin_width: float, what: str) -> FloatArray:
    """Edges ``mmin, mmin + dm, ..., mmax``; ``(mmax - mmin)`` must be a whole number of bins."""
    span = mmax - mmin
    n_float = span / bin_width
    n = int(round(n_float))
    if n < 1 or abs(n_float - n) > 1e-6:
        raise ValueError(
            f"bin_width must divide {what} into a whole number of bins; got "
            f"{what} = {span:g} and bin_width = {bin_width:g} ({n_float:.6g} bins)"
        )
    edges = mmin + bin_width * np.arange(n + 1, dtype=np.float64)
    edges[-1] = mmax  # exact upper edge, no accumulated round-off
    return edges


# --------------------------------------------------------------------------- #
# doubly truncated Gutenberg-Richter
# --------------------------------------------------------------------------- #
def truncated_gr(
    *,
    b_value: float,
    mmin: float,
    mmax: float,
    bin_width: float = 0.1,
    rate_above_mmin: float | None = None,
    a_value: float | None = None,
) -> MagnitudeBins:
    r"""Doubly truncated Gutenberg-Richter distribution, binned exactly.

    Parameters
    ----------
    b_value : float
        Gutenberg-Richter b-value [-], > 0.
    mmin, mmax : float [Mw]
        Lower and upper truncation magnitudes, ``mmin < mmax``.
    bin_width : float [Mw], optional
        Bin width; ``mmax - mmin`` must be a whole number of bins. Default 0.1.
    rate_above_mmin : float [1/yr], optional
        Annual rate of events with ``mmin <= M <= mmax`` (the total rate).
    a_value : float, optional
        a-value of the untruncated cumulative relation
        :math:`\log_{10} N(\ge m) = a - b m` [log10 of 1/yr]. Give exactly one of
        ``rate_above_mmin`` and ``a_value``.

    Returns
    -------
    MagnitudeBins
        Bin centres [Mw] and annual rates [1/yr].

    Raises
    ------
    ValueError
        If a parameter is out of range, both or neither of ``rate_above_mmin`` and
        ``a_value`` are given, or the bin width does not divide the range.

    Notes
    -----
    The magnitude density is the doubly truncated exponential of Cosentino, Ficarra
    & Luzio (1977), eq. (a), with :math:`\beta = b \ln 10`:

    .. math:: f(m) = \frac{\beta e^{-\beta (m - m_{min})}}{1 - e^{-\beta (m_{max} - m_{min})}},
              \quad m_{min} \le m \le m_{max},

    so the cumulative distribution is
    :math:`F(m) = (1 - 10^{-b(m - m_{min})}) / (1 - 10^{-b(m_{max} - m_{min})})` and the
    rate of bin :math:`[m_{lo}, m_{hi}]` is :math:`N\,[F(m_{hi}) - F(m_{lo})]` with
    :math:`N` the total rate. The differences are evaluated with ``expm1`` to keep
    full relative precision in narrow bins.

    With ``a_value`` the bin rates are the increments of the untruncated line,
    :math:`10^{a - b m_{lo}} - 10^{a - b m_{hi}}`: the truncation removes only the
    events above ``mmax``. This is the same distribution with
    :math:`N = 10^{a - b m_{min}} - 10^{a - b m_{max}}`.

    References
    ----------
    Cosentino, P., Ficarra, V. & Luzio, D. (1977). Truncated exponential
    frequency-magnitude relationship in earthquake statistics. Bull. Seismol. Soc.
    Am. 67(6), 1615-1623.
    """
    b = _positive("b_value", b_value)
    lo = _finite("mmin", mmin)
    hi = _finite("mmax", mmax)
    if not hi > lo:
        raise ValueError(f"mmax must be > mmin; got mmin = {mmin!r}, mmax = {mmax!r}")
    dm = _positive("bin_width", bin_width)
    if (rate_above_mmin is None) == (a_value is None):
        raise ValueError("give exactly one of rate_above_mmin and a_value")
    if a_value is not None:
        a = _finite("a_value", a_value)
        total = 10.0 ** (a - b * lo) * -math.expm1(-b * _LN10 * (hi - lo))
    else:
        total = _non_negative("rate_above_mmin", rate_above_mmin)

    edges = _bin_edges(lo, hi, dm, "mmax - mmin")
    beta = b * _LN10
    # F(hi_i) - F(lo_i) = e^{-beta (lo_i - mmin)} (1 - e^{-beta (hi_i - lo_i)}) / (1 - e^{-beta (mmax - mmin)})
    widths = np.diff(edges)
    share = np.exp(-beta * (edges[:-1] - lo)) * -np.expm1(-beta * widths) / -math.expm1(-beta * (hi - lo))
    centres = 0.5 * (edges[:-1] + edges[1:])
    return MagnitudeBins(centres, total * share)


# --------------------------------------------------------------------------- #
# Youngs & Coppersmith (1985) characteristic model
# --------------------------------------------------------------------------- #
def _yc85_cdf(m: FloatArray, beta: float, m0: float, mu: float) -> FloatArray:
    """Cumulative distribution of the Youngs & Coppersmith (1985) density on [m0, mu]."""
    mc_lower = mu - YC85_BOX_WIDTH  # lower edge of the characteristic box
    norm = -math.expm1(-beta * (mc_lower - m0))  # 1 - exp(-beta (mu - m0 - dm2))
    height = beta * math.exp(-beta * (mu - m0 - YC85_BOX_OFFSET - YC85_BOX_WIDTH)) / norm
    c = height * YC85_BOX_WIDTH
    m = np.clip(np.asarray(m, dtype=np.float64), m0, mu)
    below = -np.expm1(-beta * (np.minimum(m, mc_lower) - m0)) / norm
    box = height * np.maximum(m - mc_lower, 0.0)
    return (below + box) / (1.0 + c)


def characteristic_yc85(
    *,
    b_value: float,
    mmin: float,
    mchar: float,
    bin_width: float = 0.05,
    total_rate: float | None = None,
    moment_rate_nm_per_yr: float | None = None,
    moment_constant: float = HK79_MOMENT_CONSTANT,
) -> MagnitudeBins:
    r"""Characteristic-earthquake distribution of Youngs & Coppersmith (1985), binned exactly.

    Parameters
    ----------
    b_value : float
        b-value [-] of the exponential (non-characteristic) part, > 0.
    mmin : float [Mw]
        Minimum magnitude :math:`m_0`.
    mchar : float [Mw]
        Characteristic magnitude: the centre of the uniform box
        ``[mchar - 0.25, mchar + 0.25]``; the maximum magnitude is
        :math:`m_u = m_{char} + 0.25`. Requires ``mchar - 0.25 > mmin``.
    bin_width : float [Mw], optional
        Bin width; ``mchar + 0.25 - mmin`` must be a whole number of bins. Default 0.05,
        which does so for any ``mmin`` and ``mchar`` given to 0.05 (with 0.1 the box edges
        ``mchar -+ 0.25`` fall on bin edges only when ``mchar - mmin`` ends in .05).
    total_rate : float [1/yr], optional
        Annual rate of all events with ``M >= mmin`` (exponential part and box).
    moment_rate_nm_per_yr : float [N m/yr], optional
        Moment rate the distribution must release; the rates are scaled with
        :func:`moment_balanced`. Give exactly one of ``total_rate`` and
        ``moment_rate_nm_per_yr``.
    moment_constant : float, optional
        Constant of :func:`seismic_moment_nm` used for the moment balance, 9.05
        (default) or 9.1.

    Returns
    -------
    MagnitudeBins
        Bin centres [Mw] and annual rates [1/yr], from ``mmin`` to ``mchar + 0.25``.

    Notes
    -----
    The density (Youngs & Coppersmith 1985, the characteristic-earthquake magnitude
    density of their "generalized" recurrence model; written here from memory, the
    equation number is not checked) with :math:`\beta = b \ln 10`,
    :math:`\Delta m_1 = 1.0`, :math:`\Delta m_2 = 0.5` and
    :math:`m_u = m_{char} + \Delta m_2 / 2` is

    .. math::

        f(m) = \frac{1}{1 + C}\,
               \frac{\beta e^{-\beta (m - m_0)}}{1 - e^{-\beta (m_u - m_0 - \Delta m_2)}}
               \quad m_0 \le m \le m_u - \Delta m_2,

        f(m) = \frac{1}{1 + C}\,
               \frac{\beta e^{-\beta (m_u - m_0 - \Delta m_1 - \Delta m_2)}}
                    {1 - e^{-\beta (m_u - m_0 - \Delta m_2)}}
               \quad m_u - \Delta m_2 < m \le m_u,

        C = \frac{\beta e^{-\beta (m_u - m_0 - \Delta m_1 - \Delta m_2)}}
                 {1 - e^{-\beta (m_u - m_0 - \Delta m_2)}}\, \Delta m_2 .

    That is: an exponential density truncated at :math:`m_{char} - 0.25`, and a box of
    width 0.5 centred on :math:`m_{char}` whose height equals that exponential density
    1.0 magnitude unit below the box, at :math:`m_{char} - 1.25`; the
    :math:`1/(1+C)` factor normalises the total. Bin rates are exact integrals of
    :math:`f` over each bin times the total rate.

    With ``moment_rate_nm_per_yr`` the shape is computed for a unit total rate and
    scaled so that :math:`\sum_i \lambda_i M_0(m_i)` equals the moment rate (moment of
    each bin at its centre; the paper integrates the continuous density instead, which
    differs by the discretisation of the bins).

    References
    ----------
    Youngs, R. R. & Coppersmith, K. J. (1985). Implications of fault slip rates and
    earthquake recurrence models to probabilistic seismic hazard estimates. Bull.
    Seismol. Soc. Am. 75(4), 939-964.
    """
    b = _positive("b_value", b_value)
    m0 = _finite("mmin", mmin)
    mc = _finite("mchar", mchar)
    mu = mc + 0.5 * YC85_BOX_WIDTH
    if not mu - YC85_BOX_WIDTH > m0:
        raise ValueError(
            f"mchar - {0.5 * YC85_BOX_WIDTH} must be > mmin (the exponential part must not be "
            f"empty); got mmin = {mmin!r}, mchar = {mchar!r}"
        )
    dm = _positive("bin_width", bin_width)
    if (total_rate is None) == (moment_rate_nm_per_yr is None):
        raise ValueError("give exactly one of total_rate and moment_rate_nm_per_yr")
    edges = _bin_edges(m0, mu, dm, "mchar + 0.25 - mmin")
    cdf = _yc85_cdf(edges, b * _LN10, m0, mu)
    share = np.diff(cdf)
    centres = 0.5 * (edges[:-1] + edges[1:])
    if total_rate is not None:
        return MagnitudeBins(centres, _non_negative("total_rate", total_rate) * share)
    return moment_balanced(
        MagnitudeBins(centres, share), moment_rate_nm_per_yr, moment_constant=moment_constant
    )


# --------------------------------------------------------------------------- #
# single magnitude
# --------------------------------------------------------------------------- #
def single_magnitude(mag: float, rate: float) -> MagnitudeBins:
    """One magnitude bin.

    Parameters
    ----------
    mag : float [Mw]
    rate : float [1/yr], >= 0

    Returns
    -------
    MagnitudeBins
        ``mag`` of shape (1,) and ``rate`` of shape (1,).
    """
    return MagnitudeBins(
        np.array([_finite("mag", mag)]), np.array([_non_negative("rate", rate)])
    )


# --------------------------------------------------------------------------- #
# seismic moment and moment balancing
# --------------------------------------------------------------------------- #
def seismic_moment_nm(mag: ArrayLike, *, moment_constant: float = HK79_MOMENT_CONSTANT) -> FloatArray:
    r"""Seismic moment [N m] of moment magnitude ``mag``.

    Parameters
    ----------
    mag : array_like [Mw]
    moment_constant : float, optional
        :math:`c` in :math:`\log_{10} M_0 = 1.5 M_w + c`: 9.05 (default), Hanks &
        Kanamori (1979) eq. 7 (numbering from memory), :math:`M_w = \tfrac{2}{3}\log_{10} M_0 - 10.7` with
        :math:`M_0` in dyne cm, converted to N m; or 9.1, the rounded IASPEI standard
        form (common practice).

    Returns
    -------
    ndarray [N m]

    References
    ----------
    Hanks, T. C. & Kanamori, H. (1979). A moment magnitude scale. J. Geophys. Res.
    84(B5), 2348-2350.
    """
    c = _moment_constant(moment_constant)
    return 10.0 ** (1.5 * np.asarray(mag, dtype=np.float64) + c)


def moment_rate_from_slip(
    slip_rate_mm_per_yr: float, area_km2: float, shear_modulus_pa: float
) -> float:
    r"""Moment rate [N m/yr] of a fault, :math:`\dot M_0 = \mu A \dot s`.

    Parameters
    ----------
    slip_rate_mm_per_yr : float [mm/yr], >= 0
        Long-term average slip rate.
    area_km2 : float [km^2], > 0
        Fault area.
    shear_modulus_pa : float [Pa], > 0
        Shear modulus (rigidity) :math:`\mu`, e.g. 3.0e10 Pa for crustal rock
        (common practice).

    Returns
    -------
    float [N m/yr]

    Notes
    -----
    The definition of seismic moment :math:`M_0 = \mu A D` (Aki 1966) per unit time,
    with :math:`A` in m^2 (``area_km2 * 1e6``) and the slip rate in m/yr
    (``slip_rate_mm_per_yr * 1e-3``).

    References
    ----------
    Aki, K. (1966). Generation and propagation of G waves from the Niigata earthquake
    of June 16, 1964. Bull. Earthq. Res. Inst. Tokyo Univ. 44, 73-88.
    """
    s = _non_negative("slip_rate_mm_per_yr", slip_rate_mm_per_yr)
    a = _positive("area_km2", area_km2)
    mu = _positive("shear_modulus_pa", shear_modulus_pa)
    return mu * (a * 1.0e6) * (s * 1.0e-3)


def mfd_moment_rate(bins: MagnitudeBins, *, moment_constant: float = HK79_MOMENT_CONSTANT) -> float:
    r"""Moment rate [N m/yr] released by a binned MFD, :math:`\sum_i \lambda_i M_0(m_i)`."""
    mag, rate = _check_bins(bins)
    return float(np.sum(rate * seismic_moment_nm(mag, moment_constant=moment_constant)))


def moment_balanced(
    bins: MagnitudeBins,
    moment_rate_nm_per_yr: float,
    *,
    moment_constant: float = HK79_MOMENT_CONSTANT,
) -> MagnitudeBins:
    r"""Scale an MFD so that it releases a given moment rate.

    Parameters
    ----------
    bins : MagnitudeBins
        Any binned MFD (its shape is kept; its total rate is replaced).
    moment_rate_nm_per_yr : float [N m/yr], >= 0
        Target, e.g. from :func:`moment_rate_from_slip`.
    moment_constant : float, optional
        9.05 (default) or 9.1; see :func:`seismic_moment_nm`.

    Returns
    -------
    MagnitudeBins
        Same magnitudes, rates multiplied by one factor so that
        :math:`\sum_i \lambda_i M_0(m_i) = \dot M_0`.

    Raises
    ------
    ValueError
        If ``bins`` has no positive rate (no shape to scale).
    """
    target = _non_negative("moment_rate_nm_per_yr", moment_rate_nm_per_yr)
    mag, rate = _check_bins(bins)
    released = float(np.sum(rate * seismic_moment_nm(mag, moment_constant=moment_constant)))
    if not released > 0.0:
        raise ValueError("moment_balanced: bins has no positive rate to scale")
    return MagnitudeBins(mag.copy(), rate * (target / released))


def _check_bins(bins) -> tuple[FloatArray, FloatArray]:
    try:
        mag, rate = bins
    except (TypeError, ValueError) as exc:
        raise ValueError("bins must be a MagnitudeBins (mag, rate) pair") from exc
    mag = np.asarray(mag, dtype=np.float64)
    rate = np.asarray(rate, dtype=np.float64)
    if mag.ndim != 1 or mag.shape != rate.shape or mag.size == 0:
        raise ValueError(
            f"bins: mag and rate must be 1-D of equal non-zero length; got shapes {mag.shape}, {rate.shape}"
        )
    if not (np.all(np.isfinite(mag)) and np.all(np.isfinite(rate)) and np.all(rate >= 0.0)):
        raise ValueError("bins: magnitudes must be finite and rates finite and >= 0")
    return mag, rate
