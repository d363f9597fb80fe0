"""Shared machinery of the vectorised ground-motion models: scenario inputs, results,
mechanism and basin-depth conventions, coefficient tables, the model base class.

See :mod:`quakefolio.core.gmm` for the models and their references.
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
    "im_period_s",
    "mechanism_flags",
    "mean_z1p0_km",
    "mean_z2p5_km",
    "TECTONIC_REGIONS",
]

FloatArray = NDArray[np.float64]

#: tectonic regions a ground-motion model can be for (``VectorGmm.tectonic_regions``)
TECTONIC_REGIONS = (
    "active_crustal",
    "subduction_interface",
    "subduction_intraslab",
    "stable_continental",
)


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


def _within(arr: FloatArray, bounds: tuple) -> bool:
    """True if every value lies within ``bounds`` (False for any NaN: min and max propagate it)."""
    if arr.size == 0:
        return True
    low, low_in, high, high_in = bounds
    lo, hi = arr.min(), arr.max()
    return bool((lo >= low if low_in else lo > low) and (hi <= high if high_in else hi < high))


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
        strike [km], >= 0 (0 beside the rupture). ``None``, or NaN entries:
        unknown; ASK14 then tapers its hanging-wall term with Rjb instead
        (its Eq. 15). Not used by the other models.
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
    vs30_measured : array_like, optional
        1 where Vs30 was measured at the site, 0 where it was inferred (from
        geology, topography or a map). ``None``: inferred everywhere. Used by
        the within-event variability of ASK14 and CY14 (larger for inferred
        Vs30); the other models ignore it.
    region : str
        One region for all scenarios of this input (lower case), e.g.
        ``"global"``, ``"california"``, ``"japan"``, ``"italy"``, ``"china"``,
        ``"turkey"``, ``"taiwan"``, ``"new_zealand"``. Each model lists the
        regions it supports in ``supported_regions``.
    rhyp_km : array_like, optional
        Hypocentral distance [km], >= 0. Used by the subduction model for
        intraslab events (AG16); crustal models ignore it.
    intraslab : array_like of {0, 1}, optional
        Subduction event type: 1 for an intraslab (in-slab) event, 0 for an
        interface event. Required by AG16; crustal models ignore it.
    backarc : array_like of {0, 1}, optional
        1 for a site in the backarc of a subduction zone, 0 in the forearc or
        unknown (``None``: 0 everywhere). Used by AG16; crustal models ignore it.

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
    # subduction event type and path (AG16); other models ignore these fields
    rhyp_km: ArrayLike | None = None
    intraslab: ArrayLike | None = None
    backarc: ArrayLike | None = None
    vs30_measured: ArrayLike | None = None

    #: per field: (constraint text, predicate on the float array, NaN allowed)
    _CONSTRAINTS: ClassVar[dict] = {
        "mag": ("finite", np.isfinite, False),
        "vs30_mps": ("finite and > 0", lambda a: np.isfinite(a) & (a > 0), False),
        "rrup_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "rjb_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "rx_km": ("finite", np.isfinite, False),
        "ry0_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "ztor_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "zhyp_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "dip_deg": ("in (0, 90]", lambda a: (a > 0) & (a <= 90), False),
        "rake_deg": ("in [-180, 180] or NaN", lambda a: (a >= -180) & (a <= 180), True),
        "width_km": ("finite and > 0 or NaN", lambda a: np.isfinite(a) & (a > 0), True),
        "z1p0_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "z2p5_km": ("finite and >= 0 or NaN", lambda a: np.isfinite(a) & (a >= 0), True),
        "rhyp_km": ("finite and >= 0", lambda a: np.isfinite(a) & (a >= 0), False),
        "intraslab": ("0 or 1", lambda a: (a == 0) | (a == 1), False),
        "backarc": ("0 or 1", lambda a: (a == 0) | (a == 1), False),
        "vs30_measured": ("0 or 1", lambda a: (a == 0) | (a == 1), False),
    }

    #: per field: open or closed bounds (low, low included, high, high included) that
    #: every value meets when the field has no NaN: the predicate's set without NaN, checked
    #: with two reductions; the predicate itself runs only when this quick test fails
    _BOUNDS: ClassVar[dict] = {
        "mag": (-np.inf, False, np.inf, False),
        "vs30_mps": (0.0, False, np.inf, False),
        "rrup_km": (0.0, True, np.inf, False),
        "rjb_km": (0.0, True, np.inf, False),
        "rx_km": (-np.inf, False, np.inf, False),
        "ry0_km": (0.0, True, np.inf, False),
        "ztor_km": (0.0, True, np.inf, False),
        "zhyp_km": (0.0, True, np.inf, False),
        "dip_deg": (0.0, False, 90.0, True),
        "rake_deg": (-180.0, True, 180.0, True),
        "width_km": (0.0, False, np.inf, False),
        "z1p0_km": (0.0, True, np.inf, False),
        "z2p5_km": (0.0, True, np.inf, False),
        "rhyp_km": (0.0, True, np.inf, False),
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
            bounds = self._BOUNDS.get(f.name)  # None: a set that is no interval (0 or 1): always the full check
            if bounds is None or not _within(arr, bounds):  # a NaN or a value out of bounds: the full check
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

    def compact_field(self, name: str, model: str) -> FloatArray:
        """Field ``name`` as given, with :attr:`shape`'s number of axes but not broadcast.

        A field that varies along some axes only (e.g. per rupture on a (site, rupture)
        grid) keeps length 1 on the others, so terms that depend on it alone are computed
        once per distinct value; element by element the values are those of :meth:`field`.

        Parameters
        ----------
        name : str
            Field name, e.g. ``"mag"``.
        model : str
            Name of the model asking (used in the error message).
        """
        value = getattr(self, name)
        if value is None:
            raise ValueError(f"{model} requires GmmInput.{name}; it is None")
        return value.reshape((1,) * (len(self.shape) - value.ndim) + value.shape)

    def optional_field(self, name: str) -> FloatArray | None:
        """Field ``name`` broadcast to :attr:`shape`, or ``None`` if not given."""
        value = getattr(self, name)
        return None if value is None else np.broadcast_to(value, self.shape)

    def take(self, index: ArrayLike) -> "GmmInput":
        """The scenarios at ``index`` of a one-dimensional input, as a new input.

        Every value of the subset passed this input's checks already, so they are not
        repeated (a model evaluated on the subset gives the values it gives those
        scenarios in the whole input: the models are elementwise).

        Parameters
        ----------
        index : array_like of int or bool
            Positions along the (single) scenario axis.

        Returns
        -------
        GmmInput
            Shape ``(len(selection),)``; scalar fields stay scalar.
        """
        if len(self.shape) != 1:
            raise ValueError(f"GmmInput.take needs a one-dimensional input; shape is {self.shape}")
        idx = np.asarray(index)
        sub = object.__new__(GmmInput)
        n = None
        for f in fields(self):
            value = getattr(self, f.name)
            if f.name != "region" and value is not None and value.ndim:
                value = value[idx]
                value.setflags(write=False)
                n = value.shape
            object.__setattr__(sub, f.name, value)
        object.__setattr__(sub, "_shape", n if n is not None else np.zeros(self.shape)[idx].shape)
        return sub


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
    #: documented applicability ranges (informative, except Vs30: the hazard engine gives each
    #: model a Vs30 clamped to its range, :func:`quakefolio.core.pairs.model_input`)
    applicability: ClassVar[dict[str, object]] = {}
    #: tectonic regions (names from :data:`TECTONIC_REGIONS`) whose earthquakes the model is for
    tectonic_regions: ClassVar[tuple[str, ...]] = ()
    #: The basin depth the model takes (``"z1p0_km"`` or ``"z2p5_km"``) and its rule where a
    #: site gives none, or None for a model without a basin term.
    basin_input: ClassVar[tuple[str, str] | None] = None
    #: False when the model publishes only the total sigma: ``tau`` and ``phi`` are then NaN
    has_tau_phi: ClassVar[bool] = True
    #: False when the model has no site term (its medians are for its reference rock)
    uses_vs30: ClassVar[bool] = True

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

        exact = np.array_equal(lo_idx, hi_idx)  # tabulated periods only: every weight is 0

        def interp(values: FloatArray) -> FloatArray:
            if exact and not np.isinf(values).any():
                return values[lo_idx]  # (1 - 0) v + 0 v is v itself for finite v (and NaN)
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


