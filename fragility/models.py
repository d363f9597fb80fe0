r"""Damage-state sets: lognormal fragility functions plus a consequence model per class.

A building class has ordered damage states :math:`j = 1..n`; reaching state :math:`j`
at intensity :math:`x` has probability :math:`\Phi(\ln(x/\theta_j)/\beta_j)` (lognormal
fragility, common practice).  Each state carries a mean damage ratio (repair cost /
replacement value), optionally its coefficient of variation, downtime and casualty
rate.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from quakefolio.core.ims import parse_im
from quakefolio.core.loss import check_damage_ratios
from quakefolio.core.risk import damage_state_rates, lognormal_crossing_im, lognormal_fragility
from quakefolio.core.vulnerability import check_vulnerability, mean_loss_ratio_at, vulnerability_states

__all__ = ["DamageStateSet", "VulnerabilityFunction", "FragilityLibrary", "CrossingError"]


class CrossingError(ValueError):
    """Adjacent damage-state curves cross inside the hazard's IM range."""

    def __init__(self, class_code, lower, upper, im_value, im):
        self.class_code, self.lower, self.upper, self.im_value, self.im = class_code, lower, upper, im_value, im
        super().__init__(
            f"class {class_code!r}: fragility curves of '{lower}' and '{upper}' cross at "
            f"{im} = {im_value:.4g} g, inside the hazard's IM range; fix the library or set "
            f"[fragility] crossing = \"envelope\""
        )


@dataclass(frozen=True)
class DamageStateSet:
    """Fragility and consequence model of one building class.

    Attributes
    ----------
    class_code : str
    im : str
        Canonical IM name, e.g. ``"SA_0.3"``.
    names : tuple of str
        Damage-state names in increasing severity.
    medians : ndarray (n_ds,) [IM units, g]
    betas : ndarray (n_ds,) [-]
    mean_damage_ratio : ndarray (n_ds,) [-]
    cov : ndarray (n_ds,) [-], 0 = deterministic loss ratio
    downtime_days : ndarray (n_ds,) [days], NaN where not given
    casualty_rate : ndarray (n_ds,) [-], fraction of occupants, NaN where not given
    collapse_index : int
        Index of the collapse state (default: the last).
    contents_damage_ratio : ndarray (n_ds,) [-]
        Mean contents loss / contents value per state, in [0, 1] and non-decreasing;
        NaN where not given (default).
    """

    class_code: str
    im: str
    names: tuple
    medians: np.ndarray
    betas: np.ndarray
    mean_damage_ratio: np.ndarray
    cov: np.ndarray
    downtime_days: np.ndarray
    casualty_rate: np.ndarray
    collapse_index: int = -1
    description: str = ""
    contents_damage_ratio: np.ndarray = None

    def __post_init__(self):
        n = len(self.names)
        if n == 0:
            raise ValueError(f"class {self.class_code!r}: at least one damage state is needed")
        if len(set(self.names)) != n:
            raise ValueError(f"class {self.class_code!r}: damage-state names must be unique, got {list(self.names)}")
        object.__setattr__(self, "im", parse_im(self.im))
        if self.contents_damage_ratio is None:
            object.__setattr__(self, "contents_damage_ratio", np.full(n, np.nan))
        for attr in ("medians", "betas", "mean_damage_ratio", "cov", "downtime_days", "casualty_rate",
                     "contents_damage_ratio"):
            arr = np.asarray(getattr(self, attr), dtype=float)
            if arr.shape != (n,):
                raise ValueError(f"class {self.class_code!r}: {attr} needs {n} values, got shape {arr.shape}")
            arr.setflags(write=False)
            object.__setattr__(self, attr, arr)
        m, b = self.medians, self.betas
        if np.any(~np.isfinite(m)) or np.any(m <= 0):
            raise ValueError(f"class {self.class_code!r}: median must be a positive number, got {m.tolist()}")
        if np.any(np.diff(m) <= 0):
            raise ValueError(
                f"class {self.class_code!r}: damage-state medians must increase with severity, got {m.tolist()}")
        if np.any(~np.isfinite(b)) or np.any(b <= 0):
            raise ValueError(f"class {self.class_code!r}: beta must be a positive number, got {b.tolist()}")
        try:
            check_damage_ratios(self.mean_damage_ratio, self.cov)
        except ValueError as exc:
            raise ValueError(f"class {self.class_code!r}: {exc}") from None
        dd, cr = self.downtime_days, self.casualty_rate
        if np.any(dd[np.isfinite(dd)] < 0) or np.any(np.isinf(dd)):
            raise ValueError(f"class {self.class_code!r}: downtime_days must be non-negative")
        if np.any((cr[np.isfinite(cr)] < 0) | (cr[np.isfinite(cr)] > 1)) or np.any(np.isinf(cr)):
            raise ValueError(f"class {self.class_code!r}: casualty_rate must lie in [0, 1]")
        cdr = self.contents_damage_ratio
        if np.isfinite(cdr).any():
            try:
                check_damage_ratios(cdr[np.isfinite(cdr)])  # the states that give one
            except ValueError as exc:
                raise ValueError(f"class {self.class_code!r}: contents_damage_ratio: {exc}") from None
        ci = self.collapse_index % n
        object.__setattr__(self, "collapse_index", ci)

    @property
    def n_states(self):
        return len(self.names)

    def probabilities(self, im):
        """P(DS >= j | im) [-], shape ``np.shape(im) + (n_ds,)``."""
        return lognormal_fragility(np.asarray(im, dtype=float)[..., None], self.medians, self.betas)

    def crossings(self, im_min, im_max):
        """Adjacent state pairs whose curves cross within ``[im_min, im_max]`` [g].

        Returns a list of ``(lower_name, upper_name, im_at_crossing)``; non-crossing
        adjacent pairs imply ordered probabilities for every pair (transitivity).
        """
        out = []
        for j in range(self.n_states - 1):
            x = float(lognormal_crossing_im(self.medians[j], self.betas[j], self.medians[j + 1], self.betas[j + 1]))
            if np.isfinite(x) and im_min <= x <= im_max:
                out.append((self.names[j], self.names[j + 1], x))
        return out

    def check_crossing(self, im_min, im_max):
        """Raise :class:`CrossingError` at the first crossing inside ``[im_min, im_max]``."""
        found = self.crossings(im_min, im_max)
        if found:
            lower, upper, x = found[0]
            raise CrossingError(self.class_code, lower, upper, x, self.im)

    def annual_rates(self, im_levels, rates, tail="extrapolate", envelope=False, diagnostics=False):
        """Damage-state rates [1/yr] for hazard curves of this class's IM (core.risk)."""
        return damage_state_rates(im_levels, rates, self.medians, self.betas, tail=tail,
                                  envelope=envelope, diagnostics=diagnostics)

    #: A class given by damage states (:class:`VulnerabilityFunction` gives none).
    has_damage_states = True

    def loss_states(self, im_levels, rates, tail="extrapolate", envelope=False, diagnostics=False):
        """Rates [1/yr], mean loss ratios and CoVs [-] for the loss kernels of :mod:`quakefolio.core.loss`.

        For damage states: the damage-state rates with the class's own consequence model
        (``(rates, mean_damage_ratio, cov)``, then the tail shares if ``diagnostics``).
        """
        out = self.annual_rates(im_levels, rates, tail=tail, envelope=envelope, diagnostics=diagnostics)
        if not diagnostics:
            return out, self.mean_damage_ratio, self.cov
        return out[0], self.mean_damage_ratio, self.cov, out[1], out[2]


@dataclass(frozen=True)
class VulnerabilityFunction:
    """Loss ratio given intensity of one building class, without damage states.

    Attributes
    ----------
    class_code : str
    im : str
        Canonical IM name.
    levels : ndarray (m,) [IM units, g]
        Increasing intensity levels of the table.
    mean_loss_ratio : ndarray (m,) [-]
        Mean repair cost / replacement value at each level, in [0, 1], non-decreasing.
    cov : ndarray (m,) [-]
        Coefficient of variation of the loss ratio at each level (0: deterministic).
    description : str

    Notes
    -----
    Interpolation, distribution and classical integral: :mod:`quakefolio.core.vulnerability`.
    Such a class has no damage states: no damage-state rates, no collapse, no consequences
    given per damage state (casualties, downtime, contents).
    """

    class_code: str
    im: str
    levels: np.ndarray
    mean_loss_ratio: np.ndarray
    cov: np.ndarray
    description: str = ""

    has_damage_states = False
    names = ()
    n_states = 0
    collapse_index = None

    def __post_init__(self):
        object.__setattr__(self, "im", parse_im(self.im))
        try:
            arrays = check_vulnerability(self.levels, self.mean_loss_ratio, self.cov)
        except ValueError as exc:
            raise ValueError(f"class {self.class_code!r}: {exc}") from None
        for attr, arr in zip(("levels", "mean_loss_ratio", "cov"), arrays):
            arr = np.array(arr, dtype=float)
            arr.setflags(write=False)
            object.__setattr__(self, attr, arr)

    def mean_at(self, im):
        """Mean loss ratio [-] at intensity ``im`` [g] (:func:`quakefolio.core.vulnerability.mean_loss_ratio_at`)."""
        return mean_loss_ratio_at(im, self.levels, self.mean_loss_ratio)

    def loss_states(self, im_levels, rates, tail="extrapolate", envelope=False, diagnostics=False):
        """Bins of the classical integral as pseudo damage states (:func:`quakefolio.core.vulnerability.vulnerability_states`).

        Returns ``(rates, mean, cov)`` [1/yr], [-], [-], each of shape ``C + (n_bins,)``, then the
        tail shares of the EAL, shape ``C + (1,)``, if ``diagnostics``; ``envelope`` has no meaning here.
        """
        out = vulnerability_states(im_levels, rates, self.levels, self.mean_loss_ratio, self.cov, tail=tail,
                                   diagnostics=diagnostics)
        if not diagnostics:
            return out
        return out[0], out[1], out[2], out[3][..., None], out[4][..., None]


@dataclass
class FragilityLibrary:
    """Damage-state sets by class code, with the file they came from and the doubts about it
    (``warnings``: located :class:`~quakefolio.core.errors.InputWarning` objects)."""

    classes: dict
    path: str | None = None
    sha256: str | None = None
    extra: dict = field(default_factory=dict)
    warnings: tuple = ()

    def __getitem__(self, code):
        try:
            return self.classes[code]
        except KeyError:
            raise KeyError(f"unknown building class {code!r}; the library defines {sorted(self.classes)}") from None

    def __contains__(self, code):
        return code in self.classes

    def __iter__(self):
        return iter(self.classes.values())

    def __len__(self):
        return len(self.classes)
