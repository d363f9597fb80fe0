r"""Vectorised ground-motion models (GMMs) for shallow crustal earthquakes.

Every model evaluates the natural-log median of an intensity measure (IM) and
its aleatory variability for many rupture-site scenarios at once. Scenario
parameters are passed as a structure of arrays (:class:`GmmInput`) whose fields
broadcast against one another; results come back as arrays of shape
``(n_ims, *scenario_shape)`` (:class:`GmmResult`).

Intensity measures are named ``PGA`` or ``SA_<period in s>`` (``SA_0.2``,
``SA_1.0``); values are in g, medians are returned as ``ln(g)``.

Coefficient tables are read from the data files shipped inside the installed
``pygmm`` package (never copied into this repository), with the standard
``csv`` module into numpy arrays, once per model; this module does no other
file I/O and does not import pygmm itself.

Models
------
``BSSA14``
    Boore, Stewart, Seyhan & Atkinson (2014), Earthquake Spectra 30(3),
    1057-1085, doi:10.1193/070113EQS184M.
``CB14``
    Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), 1087-1115,
    doi:10.1193/062913EQS175M.

Spectral periods between tabulated periods
------------------------------------------
For ``SA_T`` with ``T`` not in a model's table, the ln median, tau, phi and
total sigma are each interpolated linearly in ``ln(T)`` between the two
bracketing tabulated periods (a local power law in period for the median).
``sigma**2 == tau**2 + phi**2`` therefore holds exactly only at tabulated
periods. A period outside the tabulated range raises ``ValueError``.

Verification
------------
Both models are checked against pygmm's scalar implementations to 1e-6 in ln
units (``tests/test_gmm_oracle.py``); the few places where that package departs
from the papers, and how the comparison handles them, are listed there.
"""

from __future__ import annotations

import csv
import importlib.util
import math
from dataclasses import dataclass, fields
from functools import cached_property
from pathlib import Path
from typing import ClassVar, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from quakefolio.core.ims import model_period

__all__ = [
    "GmmInput",
    "GmmResult",
    "VectorGmm",
    "Bssa14",
    "Cb14",
    "GMM_REGISTRY",
    "get_gmm",
    "im_period_s",
    "mechanism_flags",
    "mean_z1p0_km",
    "mean_z2p5_km",
]

FloatArray = NDArray[np.float64]

# --------------------------------------------------------------------------- #
# Intensity-measure names
# --------------------------------------------------------------------------- #
def im_period_s(im: str) -> float:
    """Spectral period [s] of an intensity-measure name; 0.0 for ``PGA``.

    The names are read by the project's one parser, :func:`quakefolio.core.ims.model_period`
    (PGA at T = 0, the row of the coefficient tables; see :mod:`quakefolio.core.ims`).

    Parameters
    ----------
    im : str
        ``"PGA"`` or ``"SA_<period in s>"`` (e.g. ``"SA_0.2"``).

    Returns
    -------
    float
        Period [s]; ``0.0`` denotes PGA.

    Raises
    ------
    ValueError
        If the name is not of either form or the period is not in (0, 20] s.
    """
    return model_period(im)


# --------------------------------------------------------------------------- #
# Scenario parameters
# --------------------------------------------------------------------------- #
def _as_float_array(name: str, value: ArrayLike) -> FloatArray:
    try:
        arr = np.array(value, dtype=np.float64)  # a copy: the caller's array stays writable
    except (TypeError, ValueError) as exc:
        raise ValueError(f"GmmInput: {name!r} must be numeric array_like; got {value!r}") from exc
    return arr


def _require(name: str, arr: FloatArray, ok: NDArray[np.bool_], constraint: str) -> None:
    if not np.all(ok):
        bad = np.argwhere(~ok)[0]
        where = tuple(int(i) for i in bad)
        got = arr[tuple(bad)] if arr.ndim else arr[()]
        raise ValueError(
            f"GmmInput: {name!r} must be {constraint}; got {float(got)!r}"
            + (f" at index {where}" if arr.ndim else "")
        )


@dataclass(frozen=True, eq=False)
class GmmInput:
    """Rupture-site scenario parameters as a structure of arrays.

    All array fields are array_like and must broadcast to one common shape, the
    *scenario shape* (see :attr:`shape`). Fields a model does not use may be
    left as ``None``; a model that needs a missing field raises ``ValueError``.

    Parameters
    ----------
    mag : array_like
        Moment magnitude [-].
    vs30_mps : array_like
        Time-averaged shear-wave velocity of the top 30 m [m/s], > 0.
    rrup_km : array_like, optional
        Closest distance to the rupture plane [km], >= 0.
    rjb_km : array_like, optional
        Joyner-Boore distance (closest distance to the surface projection of
        the rupture) [km], >= 0.
    rx_km : array_like, optional
        Horizontal distance from the top edge of rupture measured perpendicular
        to strike, positive on the hanging wall [km].
    ry0_km : array_like, optional
        Horizontal distance off the end of the rupture measured parallel to
        strike [km], >= 0. Not used by BSSA14 or CB14; carried for other models.
    ztor_km : array_like, optional
        Depth to the top of rupture [km], >= 0.
    zhyp_km : array_like, optional
        Hypocentral depth [km], >= 0. ``None``, or NaN entries: model default
        estimate.
    dip_deg : array_like, optional
        Rupture dip [deg], in (0, 90].
    rake_deg : array_like, optional
        Rake [deg], in [-180, 180]. Style of faulting follows the NGA-West2
        convention: reverse for 30 < rake < 150, normal for -150 < rake < -30,
        strike-slip otherwise. NaN means "unspecified mechanism" (accepted only
        by models that have an unspecified-mechanism term, i.e. BSSA14).
    width_km : array_like, optional
        Down-dip rupture width [km], > 0. ``None``, or NaN entries: model
        default estimate.
    z1p0_km : array_like, optional
        Depth to the 1.0 km/s shear-wave horizon [km], >= 0. ``None``, or NaN
        entries: unknown, the model's default (mean) depth for the site's
        Vs30 is used.
    z2p5_km : array_like, optional
        Depth to the 2.5 km/s shear-wave horizon [km], >= 0. ``None``, or NaN
        entries: unknown, the model's default (mean) depth is used.
    region : str
        One region for all scenarios of this input (lower case), e.g.
        ``"global"``, ``"california"``, ``"japan"``, ``"italy"``, ``"china"``,
        ``"turkey"``, ``"taiwan"``, ``"new_zealand"``. Each model lists the
        regions it supports in ``supported_regions``.

    Raises
    ------
    ValueError
        If a field is not numeric, violates its physical constraint, or the
        fields do not broadcast together.
    """

    mag: ArrayLike
    vs30_mps: ArrayLike
    rrup_km: ArrayLike | None = None
    rjb_km: ArrayLike | None = None
    rx_km: ArrayLike | None = None
    ry0_km: ArrayLike | None = None
    ztor_km: ArrayLike | None = None
    zhyp_km: ArrayLike | None = None
    dip_deg: ArrayLike | None = None
    rake_deg: ArrayLike | None = None
    width_km: ArrayLike | None = None
    z1p0_km: ArrayLike | None = None
    z2p5_km: ArrayLike | None = None
    region: str = "global"

    #: per field: (constraint text, predicate on the float array, NaN allowed)
    _CONSTRAINTS: ClassVar[dict] = {
        "mag": ("finite", np.isfinite, False),
        "vs30_mps": ("finite and > 0", lambda a: np.isfinite(a) & (a > 0), False),
        "rrup_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "rjb_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "rx_km": ("finite", np.isfinite, False),
        "ry0_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "ztor_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "zhyp_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "dip_deg": ("in (0, 90]", lambda a: (a > 0) & (a <= 90), False),
        "rake_deg": ("in [-180, 180] or NaN", lambda a: (a >= -180) & (a <= 180), True),
        "width_km": ("finite and > 0 or NaN", lambda a: np.isfinite(a) & (a > 0), True),
        "z1p0_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "z2p5_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
    }

    def __post_init__(self) -> None:
        shapes = []
        for f in fields(self):
            if f.name == "region":
                continue
            value = getattr(self, f.name)
            if value is None:
                continue
            arr = _as_float_array(f.name, value)
            text, predicate, nan_ok = self._CONSTRAINTS[f.name]
            ok = predicate(arr)
            if nan_ok:
                ok = ok | np.isnan(arr)
            _require(f.name, arr, np.asarray(ok), text)
            arr.setflags(write=False)
            object.__setattr__(self, f.name, arr)
            shapes.append(arr.shape)
        if not isinstance(self.region, str):
            raise ValueError(f"GmmInput: 'region' must be a str; got {self.region!r}")
        object.__setattr__(self, "region", self.region.strip().lower())
        try:
            shape = np.broadcast_shapes(*shapes)
        except ValueError as exc:
            raise ValueError(
                f"GmmInput: fields do not broadcast to one scenario shape: {exc}"
            ) from exc
        object.__setattr__(self, "_shape", shape)

    @property
    def shape(self) -> tuple[int, ...]:
        """Broadcast scenario shape of all given fields."""
        return self._shape  # type: ignore[attr-defined]

    def field(self, name: str, model: str) -> FloatArray:
        """Field ``name`` broadcast to :attr:`shape`; ``ValueError`` if it is missing.

        Parameters
        ----------
        name : str
            Field name, e.g. ``"rjb_km"``.
        model : str
            Name of the model asking (used in the error message).
        """
        value = getattr(self, name)
        if value is None:
            raise ValueError(f"{model} requires GmmInput.{name}; it is None")
        return np.broadcast_to(value, self.shape)

    def optional_field(self, name: str) -> FloatArray | None:
        """Field ``name`` broadcast to :attr:`shape`, or ``None`` if not given."""
        value = getattr(self, name)
        return None if value is None else np.broadcast_to(value, self.shape)


@dataclass(frozen=True, eq=False)
class GmmResult:
    """Ground-motion model output for a list of IMs and many scenarios.

    Attributes
    ----------
    ims : tuple of str
        IM names, in the order of the leading axis of every array.
    ln_median : ndarray, shape (n_ims, *scenario_shape) [ln g]
        Natural log of the median IM.
    tau : ndarray, shape (n_ims, *scenario_shape) [ln units]
        Between-event standard deviation.
    phi : ndarray, shape (n_ims, *scenario_shape) [ln units]
        Within-event standard deviation.
    sigma : ndarray, shape (n_ims, *scenario_shape) [ln units]
        Total standard deviation.
    model : str
        Registry name of the model that produced the result.
    """

    ims: tuple[str, ...]
    ln_median: FloatArray
    tau: FloatArray
    phi: FloatArray
    sigma: FloatArray
    model: str

    def median_g(self) -> FloatArray:
        """Median IM [g], ``exp(ln_median)``."""
        return np.exp(self.ln_median)


# --------------------------------------------------------------------------- #
# Shared building blocks
# --------------------------------------------------------------------------- #
def mechanism_flags(rake_deg: ArrayLike) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Style-of-faulting indicator arrays from rake.

    Parameters
    ----------
    rake_deg : array_like [deg]
        Rake in [-180, 180]; NaN for an unspecified mechanism.

    Returns
    -------
    unspecified, strike_slip, normal, reverse : ndarray of {0.0, 1.0}
        Reverse for 30 < rake < 150, normal for -150 < rake < -30, strike-slip
        otherwise, unspecified where rake is NaN.

    Notes
    -----
    Rake classes as used by both BSSA14 (Boore et al. 2014, model description)
    and CB14 (Campbell & Bozorgnia 2014, definitions of F_RV and F_NM).
    """
    rake = np.asarray(rake_deg, dtype=np.float64)
    unspecified = np.isnan(rake)
    with np.errstate(invalid="ignore"):
        reverse = (rake > 30.0) & (rake < 150.0)
        normal = (rake > -150.0) & (rake < -30.0)
    strike_slip = ~(unspecified | reverse | normal)
    return (
        unspecified.astype(np.float64),
        strike_slip.astype(np.float64),
        normal.astype(np.float64),
        reverse.astype(np.float64),
    )


def mean_z1p0_km(vs30_mps: ArrayLike, region: str = "california") -> FloatArray:
    r"""Mean depth to the 1.0 km/s horizon [km] given Vs30.

    Parameters
    ----------
    vs30_mps : array_like [m/s]
    region : str
        ``"japan"`` uses the Japan relation; any other value the California one.

    Returns
    -------
    ndarray [km]

    Notes
    -----
    California (BSSA14 Eq. 11):

    .. math:: \ln \mu_{z1} = -\frac{7.15}{4}
              \ln\frac{V_{S30}^4 + 570.94^4}{1360^4 + 570.94^4} - \ln 1000

    Japan (BSSA14 Eq. 12):

    .. math:: \ln \mu_{z1} = -\frac{5.23}{2}
              \ln\frac{V_{S30}^2 + 412.39^2}{1360^2 + 412.39^2} - \ln 1000

    References
    ----------
    Chiou & Youngs (2014), Earthquake Spectra 30(3); as adopted by Boore et al.
    (2014), Earthquake Spectra 30(3), Eqs. 11-12.
    """
    vs30 = np.asarray(vs30_mps, dtype=np.float64)
    if region == "japan":
        power, v_knee, slope = 2.0, 412.39, -5.23 / 2.0
    else:
        power, v_knee, slope = 4.0, 570.94, -7.15 / 4.0
    ratio = (vs30**power + v_knee**power) / (1360.0**power + v_knee**power)
    return np.exp(slope * np.log(ratio)) / 1000.0


def mean_z2p5_km(vs30_mps: ArrayLike, region: str = "california") -> FloatArray:
    r"""Default depth to the 2.5 km/s horizon [km] given Vs30 (CB14).

    Parameters
    ----------
    vs30_mps : array_like [m/s]
    region : str
        ``"japan"`` uses the Japan relation; any other value the California one.

    Returns
    -------
    ndarray [km]

    Notes
    -----
    California, CB14 Eq. 33: :math:`\ln Z_{2.5} = 7.089 - 1.144 \ln V_{S30}`.
    Japan, CB14 Eq. 34: :math:`\ln Z_{2.5} = 5.359 - 1.102 \ln V_{S30}`.

    References
    ----------
    Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), Eqs. 33-34.
    """
    vs30 = np.asarray(vs30_mps, dtype=np.float64)
    if region == "japan":
        intercept, slope = 5.359, 1.102
    else:
        intercept, slope = 7.089, 1.144
    return np.exp(intercept - slope * np.log(vs30))


def _pygmm_data_dir() -> Path:
    """Folder of the coefficient tables inside the installed ``pygmm`` package."""
    spec = importlib.util.find_spec("pygmm")
    if spec is None or not spec.submodule_search_locations:
        raise ImportError(
            "the ground-motion coefficient tables come from the installed 'pygmm' package "
            "(pip install 'pygmm>=0.8'); it was not found"
        )
    return Path(next(iter(spec.submodule_search_locations))) / "data"


def _read_coefficient_table(filename: str) -> dict[str, FloatArray]:
    """Read one of pygmm's coefficient CSVs into ``{column: float array}``.

    The header is the first line whose first cell (without a leading ``#``) is
    ``period``; lines before it are comments.
    """
    path = _pygmm_data_dir() / filename
    with path.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.reader(handle))
    for start, row in enumerate(rows):
        if row and row[0].lstrip("#").strip() == "period":
            break
    else:
        raise ValueError(f"{path}: no header row starting with 'period'")
    names = [cell.lstrip("#").strip() for cell in rows[start]]
    body = [r for r in rows[start + 1 :] if r and not r[0].startswith("#")]
    values = np.array([[float(cell) for cell in r] for r in body], dtype=np.float64)
    if values.ndim != 2 or values.shape[1] != len(names):
        raise ValueError(f"{path}: expected {len(names)} numeric columns per row")
    return {name: values[:, j] for j, name in enumerate(names)}


# --------------------------------------------------------------------------- #
# Model base class
# --------------------------------------------------------------------------- #
class VectorGmm:
    """Base class: IM bookkeeping, period interpolation and the public API.

    Subclasses provide the coefficient file, the list of regions and
    ``_evaluate_rows(inp, rows)``, which returns ``(ln_median, tau, phi,
    sigma)`` of shape ``(len(rows), *inp.shape)`` for coefficient-table rows.
    """

    #: registry name
    name: ClassVar[str] = ""
    #: full reference
    reference: ClassVar[str] = ""
    #: pygmm data file holding the coefficients
    coefficient_file: ClassVar[str] = ""
    #: regions accepted in ``GmmInput.region``
    supported_regions: ClassVar[tuple[str, ...]] = ()
    #: documented applicability ranges (informative; not enforced)
    applicability: ClassVar[dict[str, object]] = {}

    @cached_property
    def coefficients(self) -> dict[str, FloatArray]:
        """Coefficient table ``{column: array over rows}`` read from pygmm's data file."""
        return _read_coefficient_table(self.coefficient_file)

    @cached_property
    def _pga_row(self) -> int:
        rows = np.flatnonzero(self.coefficients["period"] == 0.0)
        return int(rows[0])

    @cached_property
    def _sa_rows(self) -> NDArray[np.intp]:
        """Rows of spectral periods (> 0), sorted by period."""
        period = self.coefficients["period"]
        rows = np.flatnonzero(period > 0.0)
        return rows[np.argsort(period[rows])]

    @property
    def tabulated_periods_s(self) -> FloatArray:
        """Spectral periods [s] with tabulated coefficients, ascending."""
        return self.coefficients["period"][self._sa_rows].copy()

    @property
    def period_range_s(self) -> tuple[float, float]:
        """Smallest and largest spectral period [s] that can be evaluated."""
        periods = self.tabulated_periods_s
        return float(periods[0]), float(periods[-1])

    @property
    def supported_ims(self) -> tuple[str, ...]:
        """Tabulated IM names; any ``SA_<T>`` with T inside :attr:`period_range_s` also works."""
        return ("PGA",) + tuple(f"SA_{p:g}" for p in self.tabulated_periods_s)

    def _im_rows(self, im: str) -> tuple[int, int, float]:
        """Table rows bracketing an IM and the weight of the upper row.

        Interpolation weight is linear in ln(period): ``w = ln(T/T_lo) / ln(T_hi/T_lo)``.
        """
        period = im_period_s(im)
        if period == 0.0:
            return self._pga_row, self._pga_row, 0.0
        periods = self.coefficients["period"][self._sa_rows]
        lo_p, hi_p = periods[0], periods[-1]
        tol = 1e-9 * period
        if period < lo_p - tol or period > hi_p + tol:
            raise ValueError(
                f"{self.name}: intensity measure {im!r} (period {period:g} s) is outside the "
                f"model's period range {lo_p:g}-{hi_p:g} s; valid: 'PGA' or 'SA_<T>' with "
                f"{lo_p:g} <= T <= {hi_p:g}"
            )
        exact = np.flatnonzero(np.abs(periods - period) <= tol)
        if exact.size:
            row = int(self._sa_rows[exact[0]])
            return row, row, 0.0
        j = int(np.searchsorted(periods, period))
        weight = math.log(period / periods[j - 1]) / math.log(periods[j] / periods[j - 1])
        return int(self._sa_rows[j - 1]), int(self._sa_rows[j]), weight

    def _check_region(self, inp: GmmInput) -> None:
        if inp.region not in self.supported_regions:
            raise ValueError(
                f"{self.name}: region {inp.region!r} not supported; valid: "
                + ", ".join(self.supported_regions)
            )

    def _coeff(self, name: str, rows: NDArray[np.intp], ndim: int) -> FloatArray:
        """Coefficient column at ``rows`` shaped ``(k, 1, ..., 1)`` for broadcasting."""
        return self.coefficients[name][rows].reshape((rows.size,) + (1,) * ndim)

    def evaluate(self, inp: GmmInput, ims: str | Sequence[str]) -> GmmResult:
        """Median and standard deviations for every scenario and IM.

        Parameters
        ----------
        inp : GmmInput
            Scenario parameters (structure of arrays).
        ims : str or sequence of str
            IM names, ``"PGA"`` or ``"SA_<period in s>"``.

        Returns
        -------
        GmmResult
            Arrays of shape ``(n_ims, *inp.shape)``; ``ln_median`` [ln g].

        Raises
        ------
        ValueError
            Unknown IM name, period outside the table, unsupported region, or a
            required scenario field missing.

        Notes
        -----
        Tabulated periods are evaluated directly from the model equations. Other
        periods: ln median, tau, phi and sigma are each interpolated linearly in
        ln(period) between the bracketing tabulated periods.
        """
        if not isinstance(inp, GmmInput):
            raise ValueError(f"{self.name}: 'inp' must be a GmmInput; got {type(inp).__name__}")
        im_list = (ims,) if isinstance(ims, str) else tuple(ims)
        if not im_list:
            raise ValueError(f"{self.name}: 'ims' is empty; give at least one IM name")
        self._check_region(inp)
        plan = [self._im_rows(im) for im in im_list]
        rows = np.unique(np.array([r for lo, hi, _ in plan for r in (lo, hi)], dtype=np.intp))
        ln_y, tau, phi, sigma = self._evaluate_rows(inp, rows)
        position = {int(r): i for i, r in enumerate(rows)}
        lo_idx = np.array([position[lo] for lo, _, _ in plan], dtype=np.intp)
        hi_idx = np.array([position[hi] for _, hi, _ in plan], dtype=np.intp)
        weight = np.array([w for _, _, w in plan]).reshape((len(plan),) + (1,) * len(inp.shape))

        def interp(values: FloatArray) -> FloatArray:
            return (1.0 - weight) * values[lo_idx] + weight * values[hi_idx]

        return GmmResult(
            ims=im_list,
            ln_median=interp(ln_y),
            tau=interp(tau),
            phi=interp(phi),
            sigma=interp(sigma),
            model=self.name,
        )

    def _evaluate_rows(
        self, inp: GmmInput, rows: NDArray[np.intp]
    ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:  # pragma: no cover - abstract
        raise NotImplementedError

    def __repr__(self) -> str:
        return f"<{type(self).__name__} {self.name!r}>"


# --------------------------------------------------------------------------- #
# Boore, Stewart, Seyhan & Atkinson (2014)
# --------------------------------------------------------------------------- #
class Bssa14(VectorGmm):
    r"""Boore, Stewart, Seyhan & Atkinson (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rjb_km``, ``vs30_mps``; optional ``rake_deg`` (``None``
    or NaN: unspecified mechanism), ``z1p0_km`` and ``region``.

    Notes
    -----
    Median (Eq. 1), all terms in ln units with Y in g:

    * Event term, Eq. 2:
      :math:`F_E = e_0 U + e_1 SS + e_2 NS + e_3 RS + e_4 (M-M_h) + e_5 (M-M_h)^2`
      for :math:`M \le M_h`; :math:`\ldots + e_6 (M-M_h)` for :math:`M > M_h`.
    * Path term, Eqs. 3-4:
      :math:`F_P = [c_1 + c_2 (M-M_{ref})]\ln(R/R_{ref}) + (c_3 + \Delta c_3)(R-R_{ref})`,
      :math:`R = \sqrt{R_{JB}^2 + h^2}`; :math:`\Delta c_3` by region.
    * Site term, Eqs. 5-8: :math:`F_S = \ln F_{lin} + \ln F_{nl} + F_{\delta z1}`;
      :math:`\ln F_{lin} = c \ln(\min(V_{S30}, V_c)/V_{ref})` (Eq. 6);
      :math:`\ln F_{nl} = f_1 + f_2 \ln((PGA_r + f_3)/f_3)` (Eq. 7) with
      :math:`f_2 = f_4[\exp\{f_5(\min(V_{S30}, V_{ref}) - 360)\} - \exp\{f_5(V_{ref} - 360)\}]`
      (Eq. 8); :math:`PGA_r` is the median PGA for :math:`V_{ref} = 760` m/s,
      i.e. :math:`\exp(F_E + F_P)` of the PGA row.
    * Basin term, Eqs. 9-12: for T >= 0.65 s,
      :math:`F_{\delta z1} = \min(f_6 \delta z_1, f_7)` with
      :math:`\delta z_1 = z_1 - \mu_{z1}(V_{S30})` (Eq. 10, Eqs. 11-12 for
      :math:`\mu_{z1}`); 0 for shorter periods and when z1 is unknown.

    Aleatory variability, Eqs. 13-17: :math:`\tau(M)` and :math:`\phi(M)` are
    linear in M between 4.5 and 5.5 (Eqs. 14-15); :math:`\phi` increases by
    :math:`\Delta\phi_R` linearly in :math:`\ln R_{JB}` between :math:`R_1` and
    :math:`R_2` (Eq. 16) and decreases by :math:`\Delta\phi_V` linearly in
    :math:`\ln V_{S30}` between :math:`V_2` and :math:`V_1` (Eq. 17);
    :math:`\sigma = \sqrt{\phi^2 + \tau^2}` (Eq. 13).

    Regions: ``global``, ``california``, ``taiwan``, ``new_zealand`` use the
    global anelastic term; ``china``, ``turkey`` and ``italy``, ``japan`` their
    regional :math:`\Delta c_3`; ``japan`` uses the Japan :math:`\mu_{z1}`.

    References
    ----------
    Boore, D.M., Stewart, J.P., Seyhan, E. & Atkinson, G.M. (2014). NGA-West2
    equations for predicting PGA, PGV, and 5% damped PSA for shallow crustal
    earthquakes. Earthquake Spectra 30(3), 1057-1085.
    """

    name = "BSSA14"
    reference = (
        "Boore, Stewart, Seyhan & Atkinson (2014), Earthquake Spectra 30(3), 1057-1085"
    )
    coefficient_file = "boore_stewart_seyhan_atkinson-2014.csv"
    supported_regions = (
        "global",
        "california",
        "taiwan",
        "new_zealand",
        "china",
        "turkey",
        "italy",
        "japan",
    )
    applicability = {
        "mag": {"strike_slip": (3.0, 8.5), "reverse": (3.0, 8.5), "normal": (3.0, 7.0)},
        "rjb_km": (0.0, 400.0),
        "vs30_mps": (150.0, 1500.0),
    }
    _DC3_COLUMN: ClassVar[dict[str, str]] = {
        "global": "dc_3global",
        "california": "dc_3global",
        "taiwan": "dc_3global",
        "new_zealand": "dc_3global",
        "china": "dc_3ct",
        "turkey": "dc_3ct",
        "italy": "dc_3ij",
        "japan": "dc_3ij",
    }
    #: shortest period [s] with a basin-depth term (Eq. 9)
    BASIN_MIN_PERIOD_S: ClassVar[float] = 0.65

    def _reference_terms(
        self, inp: GmmInput, rows: NDArray[np.intp], mag, rjb, flags
    ) -> FloatArray:
        """Event plus path term, F_E + F_P (Eqs. 2-4) [ln g], shape (k, *shape)."""
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731
        unspecified, strike_slip, normal, reverse = flags
        dm = mag - c("M_h")
        event = (
            c("e_0") * unspecified
            + c("e_1") * strike_slip
            + c("e_2") * normal
            + c("e_3") * reverse
            + np.where(dm <= 0.0, c("e_4") * dm + c("e_5") * dm**2, c("e_6") * dm)
        )
        r = np.sqrt(rjb**2 + c("h") ** 2)
        dc3 = c(self._DC3_COLUMN[inp.region])
        path = (c("c_1") + c("c_2") * (mag - c("M_ref"))) * np.log(r / c("R_ref")) + (
            c("c_3") + dc3
        ) * (r - c("R_ref"))
        return event + path

    def _evaluate_rows(self, inp, rows):
        mag = inp.field("mag", self.name)[None]
        rjb = inp.field("rjb_km", self.name)[None]
        vs30 = inp.field("vs30_mps", self.name)[None]
        rake = inp.optional_field("rake_deg")
        if rake is None:  # no rake given: unspecified mechanism (e_0 term of Eq. 2)
            rake = np.full(inp.shape, np.nan)
        flags = mechanism_flags(rake[None])
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731

        # PGA on the 760 m/s reference condition (Eq. 7 definition of PGA_r).
        pga_row = np.array([self._pga_row], dtype=np.intp)
        pga_r = np.exp(self._reference_terms(inp, pga_row, mag, rjb, flags))

        ln_y = self._reference_terms(inp, rows, mag, rjb, flags)

        # Linear site term, Eq. 6.
        ln_flin = c("c") * np.log(np.minimum(vs30, c("V_c")) / c("V_ref"))
        # Nonlinear site term, Eqs. 7-8.
        f2 = c("f_4") * (
            np.exp(c("f_5") * (np.minimum(vs30, c("V_ref")) - 360.0))
            - np.exp(c("f_5") * (c("V_ref") - 360.0))
        )
        ln_fnl = c("f_1") + f2 * np.log((pga_r + c("f_3")) / c("f_3"))
        ln_y = ln_y + ln_flin + ln_fnl

        # Basin-depth term, Eqs. 9-12.
        z1 = inp.optional_field("z1p0_km")
        if z1 is not None:
            mu_z1 = mean_z1p0_km(vs30, inp.region)
            dz1 = np.where(np.isnan(z1[None]), 0.0, z1[None] - mu_z1)
            has_basin = c("period") >= self.BASIN_MIN_PERIOD_S
            f_dz1 = np.where(has_basin, np.minimum(c("f_6") * dz1, c("f_7")), 0.0)
            ln_y = ln_y + f_dz1

        # Aleatory variability, Eqs. 13-17.
        m_weight = np.clip(mag - 4.5, 0.0, 1.0)
        tau = c("tau_1") + (c("tau_2") - c("tau_1")) * m_weight
        phi = c("phi_1") + (c("phi_2") - c("phi_1")) * m_weight
        with np.errstate(divide="ignore"):
            r_weight = np.log(rjb / c("R_1")) / np.log(c("R_2") / c("R_1"))
        phi = phi + c("dphi_R") * np.clip(r_weight, 0.0, 1.0)
        v_weight = np.log(c("V_2") / vs30) / np.log(c("V_2") / c("V_1"))
        phi = phi - c("dphi_V") * np.clip(v_weight, 0.0, 1.0)
        sigma = np.sqrt(phi**2 + tau**2)

        shape = ln_y.shape
        return (
            ln_y,
            np.broadcast_to(tau, shape).copy(),
            np.broadcast_to(phi, shape).copy(),
            np.broadcast_to(sigma, shape).copy(),
        )


# --------------------------------------------------------------------------- #
# Campbell & Bozorgnia (2014)
# --------------------------------------------------------------------------- #
class Cb14(VectorGmm):
    r"""Campbell & Bozorgnia (2014) NGA-West2 model, vectorised.

    Uses ``mag``, ``rrup_km``, ``rjb_km``, ``rx_km``, ``ztor_km``,
    ``dip_deg``, ``rake_deg``, ``vs30_mps``; optional ``width_km`` (default
    Eq. 39 with a seismogenic depth of :attr:`DEFAULT_ZBOT_KM`), ``zhyp_km``
    (default Eqs. 35-38), ``z2p5_km`` (default Eqs. 33-34) and ``region``.

    Notes
    -----
    Median, Eq. 1:
    :math:`\ln Y = f_{mag} + f_{dis} + f_{flt} + f_{hng} + f_{site} + f_{sed}
    + f_{hyp} + f_{dip} + f_{atn}`, with
    :math:`\ln Y = \ln PGA` where :math:`Y < PGA` and :math:`T < 0.25` s.

    * :math:`f_{mag}` Eq. 2: :math:`c_0 + c_1 M` plus :math:`c_2, c_3, c_4`
      slopes above M 4.5, 5.5, 6.5.
    * :math:`f_{dis}` Eq. 3: :math:`(c_5 + c_6 M)\ln\sqrt{R_{RUP}^2 + c_7^2}`.
    * :math:`f_{flt}` Eqs. 4-6: :math:`(c_8 F_{RV} + c_9 F_{NM})` times a
      magnitude taper from 0 at M 4.5 to 1 at M 5.5.
    * :math:`f_{hng}` Eqs. 7-16: :math:`c_{10} f_{hng,R_X} f_{hng,R_{RUP}}
      f_{hng,M} f_{hng,Z} f_{hng,\delta}` with :math:`R_1 = W\cos\delta` (Eq. 11)
      and :math:`R_2 = 62M - 350` (Eq. 12).
    * :math:`f_{site}` Eqs. 17-19: :math:`f_{site,G} + S_J f_{site,J}`;
      :math:`f_{site,G} = c_{11}\ln(V/k_1) + k_2\{\ln[A_{1100} + c(V/k_1)^n]
      - \ln[A_{1100} + c]\}` for :math:`V_{S30} \le k_1`, else
      :math:`(c_{11} + k_2 n)\ln(V/k_1)`; c = 1.88, n = 1.18.
      :math:`f_{site,J}` (Japan only) is read as the sum of the term valid for
      all Vs30, :math:`(c_{13} + k_2 n)\ln(V/k_1)`, and the extra term below
      200 m/s, :math:`(c_{12} + k_2 n)[\ln(V/k_1) - \ln(200/k_1)]`; this
      reading is the one that keeps the site term continuous at 200 m/s.
    * :math:`f_{sed}` Eq. 20: :math:`(c_{14} + c_{15} S_J)(Z_{2.5} - 1)` for
      :math:`Z_{2.5} \le 1` km, 0 up to 3 km,
      :math:`c_{16} k_3 e^{-0.75}[1 - \exp(-0.25(Z_{2.5} - 3))]` beyond.
    * :math:`f_{hyp}` Eqs. 21-23, :math:`f_{dip}` Eq. 24, :math:`f_{atn}`
      Eq. 25: :math:`(c_{20} + \Delta c_{20})(R_{RUP} - 80)` beyond 80 km.

    :math:`A_{1100}` is the median PGA of the same scenario at
    :math:`V_{S30} = 1100` m/s with :math:`Z_{2.5}` from Eqs. 33-34 at 1100 m/s.

    Aleatory variability, Eqs. 27-32: :math:`\tau_{\ln Y}` and
    :math:`\phi_{\ln Y}` taper linearly from the M <= 4.5 to the M >= 5.5
    values; with :math:`\alpha = k_2 A_{1100}\{[A_{1100} + c(V/k_1)^n]^{-1}
    - (A_{1100} + c)^{-1}\}` for :math:`V_{S30} < k_1` (else 0),
    :math:`\tau^2 = \tau_{\ln Y}^2 + \alpha^2\tau_{\ln PGA}^2 + 2\alpha\rho\,
    \tau_{\ln Y}\tau_{\ln PGA}`,
    :math:`\phi^2 = \phi_{\ln Y_B}^2 + \phi_{\ln AF}^2 + \alpha^2\phi_{\ln PGA_B}^2
    + 2\alpha\rho\,\phi_{\ln Y_B}\phi_{\ln PGA_B}` with
    :math:`\phi_{\ln Y_B}^2 = \phi_{\ln Y}^2 - \phi_{\ln AF}^2`;
    :math:`\sigma = \sqrt{\tau^2 + \phi^2}`. Where the PGA floor of Eq. 1
    applies, the period's own tau and phi are kept.

    Regions: ``global`` and ``california`` (California anelastic term),
    ``japan`` and ``italy`` (Japan/Italy anelastic term; Japan also gets the
    Japan site, basin and Z2.5 relations), ``china`` (China anelastic term).

    References
    ----------
    Campbell, K.W. & Bozorgnia, Y. (2014). NGA-West2 ground motion model for
    the average horizontal components of PGA, PGV, and 5% damped linear
    acceleration response spectra. Earthquake Spectra 30(3), 1087-1115.
    """

    name = "CB14"
    reference = "Campbell & Bozorgnia (2014), Earthquake Spectra 30(3), 1087-1115"
    coefficient_file = "campbell_bozorgnia_2014.csv"
    supported_regions = ("global", "california", "japan", "italy", "china")
    applicability = {
        "mag": {"strike_slip": (3.3, 8.5), "reverse": (3.3, 8.0), "normal": (3.3, 7.5)},
        "rrup_km": (0.0, 300.0),
        "vs30_mps": (150.0, 1500.0),
        "z2p5_km": (0.0, 10.0),
        "ztor_km": (0.0, 20.0),
        "zhyp_km": (0.0, 20.0),
        "dip_deg": (15.0, 90.0),
    }
    #: period-independent site constants c and n (Eq. 18)
    SITE_C: ClassVar[float] = 1.88
    SITE_N: ClassVar[float] = 1.18
    #: reference rock Vs30 for A1100 [m/s]
    VS30_ROCK_MPS: ClassVar[float] = 1100.0
    #: depth to the bottom of the seismogenic crust used by Eq. 39 when width is unknown [km]
    DEFAULT_ZBOT_KM: ClassVar[float] = 15.0
    #: periods below this [s] are floored at PGA (Eq. 1)
    PGA_FLOOR_MAX_PERIOD_S: ClassVar[float] = 0.25
    _DC20_COLUMN: ClassVar[dict[str, str]] = {
        "global": "dc_20ca",
        "california": "dc_20ca",
        "japan": "dc_20jp",
        "italy": "dc_20jp",
        "china": "dc_20ch",
    }

    @staticmethod
    def default_width_km(mag, dip_deg, ztor_km, zbot_km=15.0) -> FloatArray:
        r"""Down-dip rupture width [km] when unknown, CB14 Eq. 39.

        .. math:: W = \min\left(\sqrt{10^{(M - 4.07)/0.98}},\
                  (Z_{BOT} - Z_{TOR})/\sin\delta\right)
        """
        return np.minimum(
            np.sqrt(10.0 ** ((np.asarray(mag) - 4.07) / 0.98)),
            (zbot_km - np.asarray(ztor_km)) / np.sin(np.radians(dip_deg)),
        )

    @staticmethod
    def default_zhyp_km(mag, dip_deg, ztor_km, width_km) -> FloatArray:
        r"""Hypocentral depth [km] when unknown, CB14 Eqs. 35-38.

        :math:`Z_{HYP} = Z_{TOR} + \exp(\min[f_{\Delta Z,M} + f_{\Delta Z,\delta},\
        \ln(0.9(Z_{BOR} - Z_{TOR}))])` with
        :math:`f_{\Delta Z,M} = \min(-4.317 + 0.984M, 2.325)` (Eq. 36),
        :math:`f_{\Delta Z,\delta} = \min(0.0445(\delta - 40), 0)` (Eq. 37) and
        :math:`Z_{BOR} = Z_{TOR} + W\sin\delta` (Eq. 38).
        """
        mag = np.asarray(mag, dtype=np.float64)
        dip = np.asarray(dip_deg, dtype=np.float64)
        zbor_minus_ztor = np.asarray(width_km) * np.sin(np.radians(dip))
        ln_dz = np.minimum(
            np.minimum(-4.317 + 0.984 * mag, 2.325) + np.minimum(0.0445 * (dip - 40.0), 0.0),
            np.log(0.9 * zbor_minus_ztor),
        )
        return np.asarray(ztor_km) + np.exp(ln_dz)

    def _site_terms(self, c, vs30, a1100, region: str) -> FloatArray:
        """f_site (Eqs. 17-19) [ln units] for broadcast coefficient accessor ``c``."""
        vs_ratio = vs30 / c("k_1")
        ln_ratio = np.log(vs_ratio)
        nonlinear = c("c_11") * ln_ratio + c("k_2") * (
            np.log(a1100 + self.SITE_C * vs_ratio**self.SITE_N) - np.log(a1100 + self.SITE_C)
        )
        linear = (c("c_11") + c("k_2") * self.SITE_N) * ln_ratio
        f_site = np.where(vs30 <= c("k_1"), nonlinear, linear)
        if region == "japan":
            f_site_j = (c("c_13") + c("k_2") * self.SITE_N) * ln_ratio
            below_200 = (c("c_12") + c("k_2") * self.SITE_N) * (
                ln_ratio - np.log(200.0 / c("k_1"))
            )
            f_site_j = f_site_j + np.where(vs30 <= 200.0, below_200, 0.0)
            f_site = f_site + f_site_j
        return f_site

    def _sediment_term(self, c, z2p5, region: str) -> FloatArray:
        """f_sed (Eq. 20) [ln units]."""
        shallow_slope = c("c_14") + (c("c_15") if region == "japan" else 0.0)
        deep = c("c_16") * c("k_3") * math.exp(-0.75) * (1.0 - np.exp(-0.25 * (z2p5 - 3.0)))
        shallow = shallow_slope * (z2p5 - 1.0)
        return np.where(z2p5 <= 1.0, shallow, np.where(z2p5 <= 3.0, 0.0, deep))

    def _ln_median_no_floor(self, inp: GmmInput, rows, geo, vs30, z2p5, a1100) -> FloatArray:
        """Eq. 1 without the PGA floor, shape (k, *shape)."""
        nd = len(inp.shape)
        c = lambda name: self._coeff(name, rows, nd)  # noqa: E731
        mag, rrup, rjb, rx, ztor, dip, width, zhyp, f_rv, f_nm = geo

        f_mag = (
            c("c_0")
            + c("c_1") * mag
            + c("c_2") * np.maximum(mag - 4.5, 0.0)
            + c("c_3") * np.maximum(mag - 5.5, 0.0)
            + c("c_4") * np.maximum(mag - 6.5, 0.0)
        )
        f_dis = (c("c_5") + c("c_6") * mag) * np.log(np.sqrt(rrup**2 + c("c_7") ** 2))
        f_flt = (c("c_8") * f_rv + c("c_9") * f_nm) * np.clip(mag - 4.5, 0.0, 1.0)

        # Hanging-wall term, Eqs. 7-16.
        r1 = width * np.cos(np.radians(dip))
        r2 = 62.0 * mag - 350.0
        with np.errstate(divide="ignore", invalid="ignore"):
            near = rx / r1
            far = (rx - r1) / (r2 - r1)
        f1 = c("h_1") + c("h_2") * near + c("h_3") * near**2
        f2 = np.maximum(c("h_4") + c("h_5") * far + c("h_6") * far**2, 0.0)
        f_hng_rx = np.where(rx < 0.0, 0.0, np.where(rx < r1, f1, f2))
        f_hng_rrup = np.divide(rrup - rjb, rrup, out=np.ones_like(rrup), where=rrup > 0.0)
        f_hng_m = np.where(
            mag <= 5.5, 0.0, np.minimum(mag - 5.5, 1.0) * (1.0 + c("a_2") * (mag - 6.5))
        )
        f_hng_z = np.where(ztor <= 16.66, 1.0 - 0.06 * ztor, 0.0)
        f_hng_dip = (90.0 - dip) / 45.0
        f_hng = c("c_10") * f_hng_rx * f_hng_rrup * f_hng_m * f_hng_z * f_hng_dip

        f_site = self._site_terms(c, vs30, a1100, inp.region)
        f_sed = self._sediment_term(c, z2p5, inp.region)
        f_hyp = np.clip(zhyp - 7.0, 0.0, 13.0) * (
            c("c_17") + (c("c_18") - c("c_17")) * np.clip(mag - 5.5, 0.0, 1.0)
        )
        f_dip = c("c_19") * dip * np.clip(5.5 - mag, 0.0, 1.0)
        dc20 = c(self._DC20_COLUMN[inp.region])
        f_atn = (c("c_20") + dc20) * np.maximum(rrup - 80.0, 0.0)
        return f_mag + f_dis + f_flt + f_hng + f_site + f_sed + f_hyp + f_dip + f_atn

    def _evaluate_rows(self, inp, rows):
        name = self.name
        shape = inp.shape
        nd = len(shape)
        mag = inp.field("mag", name)
        dip = inp.field("dip_deg", name)
        ztor = inp.field("ztor_km", name)
        rake = inp.field("rake_deg", name)
        if np.any(np.isnan(rake)):
            raise ValueError(
                f"{name}: 'rake_deg' must be given for every scenario (no unspecified "
                "mechanism term in this model); got NaN"
            )
        _, _, f_nm, f_rv = mechanism_flags(rake)
        width = inp.optional_field("width_km")
        if width is None or np.any(np.isnan(width)):
            width_default = self.default_width_km(mag, dip, ztor, self.DEFAULT_ZBOT_KM)
            if width is not None:
                width_default = np.where(np.isnan(width), width_default, width)
            width = width_default
            if np.any(~(width > 0.0)):
                raise ValueError(
                    f"{name}: width_km unknown and Eq. 39 gives no positive width; "
                    f"ztor_km must be < {self.DEFAULT_ZBOT_KM} km where width_km is unknown"
                )
        zhyp = inp.optional_field("zhyp_km")
        if zhyp is None or np.any(np.isnan(zhyp)):
            zhyp_default = self.default_zhyp_km(mag, dip, ztor, width)
            zhyp = zhyp_default if zhyp is None else np.where(np.isnan(zhyp), zhyp_default, zhyp)
        vs30 = inp.field("vs30_mps", name)
        z2p5_default = mean_z2p5_km(vs30, inp.region)
        z2p5 = inp.optional_field("z2p5_km")
        z2p5 = z2p5_default if z2p5 is None else np.where(np.isnan(z2p5), z2p5_default, z2p5)

        geo = tuple(
            np.broadcast_to(a, shape)[None]
            for a in (
                mag,
                inp.field("rrup_km", name),
                inp.field("rjb_km", name),
                inp.field("rx_km", name),
                ztor,
                dip,
                width,
                zhyp,
                f_rv,
                f_nm,
            )
        )
        mag1 = geo[0]
        vs30 = vs30[None]
        z2p5 = np.broadcast_to(z2p5, shape)[None]

        # A1100: PGA at Vs30 = 1100 m/s, Z2.5 from Eqs. 33-34 at 1100 m/s. The
        # site term at 1100 m/s is on the linear branch (k1 < 1100 for PGA), so
        # the A1100 placeholder of 0 passed here is never used.
        pga_row = np.array([self._pga_row], dtype=np.intp)
        vs_rock = np.full((1,) * (nd + 1), self.VS30_ROCK_MPS)
        z2p5_rock = mean_z2p5_km(vs_rock, inp.region)
        a1100 = np.exp(self._ln_median_no_floor(inp, pga_row, geo, vs_rock, z2p5_rock, 0.0))

        all_rows = np.union1d(rows, pga_row)
        ln_y = self._ln_median_no_floor(inp, all_rows, geo, vs30, z2p5, a1100)
        c = lambda col: self._coeff(col, all_rows, nd)  # noqa: E731

        # PGA floor for short periods, Eq. 1.
        period = c("period")
        i_pga = int(np.flatnonzero(all_rows == self._pga_row)[0])
        ln_pga = ln_y[i_pga : i_pga + 1]
        floored = (period > 0.0) & (period < self.PGA_FLOOR_MAX_PERIOD_S)
        ln_y = np.where(floored, np.maximum(ln_y, ln_pga), ln_y)

        # Aleatory variability, Eqs. 27-32.
        m_weight = np.clip(5.5 - mag1, 0.0, 1.0)
        tau_y = c("tau_2") + (c("tau_1") - c("tau_2")) * m_weight
        phi_y = c("phi_2") + (c("phi_1") - c("phi_2")) * m_weight
        tau_pga = tau_y[i_pga : i_pga + 1]
        phi_pga = phi_y[i_pga : i_pga + 1]
        phi_af = c("phi_lnAF")
        phi_af_pga = phi_af[i_pga : i_pga + 1]
        rho = c("rho_lnPGAlnY")
        vs_ratio = vs30 / c("k_1")
        alpha = np.where(
            vs30 < c("k_1"),
            c("k_2")
            * a1100
            * (
                1.0 / (a1100 + self.SITE_C * vs_ratio**self.SITE_N)
                - 1.0 / (a1100 + self.SITE_C)
            ),
            0.0,
        )
        tau = np.sqrt(tau_y**2 + alpha**2 * tau_pga**2 + 2.0 * alpha * rho * tau_y * tau_pga)
        phi_y_b = np.sqrt(phi_y**2 - phi_af**2)
        phi_pga_b = np.sqrt(phi_pga**2 - phi_af_pga**2)
        phi = np.sqrt(
            phi_y_b**2
            + phi_af**2
            + alpha**2 * phi_pga_b**2
            + 2.0 * alpha * rho * phi_y_b * phi_pga_b
        )
        sigma = np.sqrt(tau**2 + phi**2)

        keep = np.searchsorted(all_rows, rows)
        out_shape = (rows.size,) + shape
        return (
            np.broadcast_to(ln_y[keep], out_shape).copy(),
            np.broadcast_to(tau[keep], out_shape).copy(),
            np.broadcast_to(phi[keep], out_shape).copy(),
            np.broadcast_to(sigma[keep], out_shape).copy(),
        )


# --------------------------------------------------------------------------- #
# Registry
# --------------------------------------------------------------------------- #
GMM_REGISTRY: dict[str, VectorGmm] = {
    "BSSA14": Bssa14(),
    "CB14": Cb14(),
}


def get_gmm(name: str) -> VectorGmm:
    """Ground-motion model registered under ``name``.

    Raises
    ------
    ValueError
        If ``name`` is not registered; the message lists the valid names.
    """
    try:
        return GMM_REGISTRY[name]
    except (KeyError, TypeError):
        raise ValueError(
            f"unknown ground-motion model {name!r}; valid names: " + ", ".join(sorted(GMM_REGISTRY))
        ) from None
