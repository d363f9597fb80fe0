"""Run configuration (``quakefolio.toml``): schema, defaults, validation.

Every key is declared once in :data:`SCHEMA` with its type, default and constraint.
Unknown sections and keys are errors that suggest the nearest valid name; every error
names the file, the line and the key.  Paths are resolved relative to the config file.
"""
from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass, field, fields
from pathlib import Path
from types import MappingProxyType

from quakefolio.core.errors import InputError, did_you_mean, locate_toml_line
from quakefolio.core.ims import parse_im
from quakefolio.core.plausibility import vs30_problem
from quakefolio.core.validation import (
    REQUIRED, Boolean, Constraint, Field, Integer, Interval, Invalid, ListOf, OneOf, Pattern, Real, Rule, Schema, Text,
    check_value, toml_place, validate_table,
)
from quakefolio.fragility.library import read_toml
from quakefolio.pipeline.io.breakdowns import BREAKDOWN_COLUMNS
from quakefolio.pipeline.io.alternatives import ALTERNATIVE_KEYS, _resolve, _ResolvedPath, parse_alternatives  # noqa: F401
from quakefolio.pipeline.io.gmm_regions import RegionBranches
from quakefolio.pipeline.io.layers import Layers as _Layers
from quakefolio.pipeline.io.occupancy import OccupancyPeriods as _OccupancyPeriods

__all__ = ["Config", "load_config", "SCHEMA", "IM_UNITS_TO_G", "resolve_execution", "sha256_file", "DEFAULT_LEVELS_G",
           "SETTINGS_CLASSES", "ScenarioSettings", "ScreeningSettings", "HazardSettings", "PortfolioSettings",
           "ProgrammeSettings", "ExposureSettings", "FragilitySettings", "OutputSettings", "ExecutionSettings"]

#: Conversion factors from accepted IM-level units to g (standard gravity 9.80665 m/s2,
#: CGPM 1901 / ISO 80000-3).
IM_UNITS_TO_G = {"g": 1.0, "m/s2": 1.0 / 9.80665, "cm/s2": 1.0 / 980.665}


def _positive_or_none(value):
    return value == "none" or (not isinstance(value, bool) and isinstance(value, (int, float)) and value > 0
                               and math.isfinite(value))


class _PositiveOrNone(Rule):
    """A positive finite number, or the string ``"none"`` (converted to None)."""

    def __init__(self):
        super().__init__(_positive_or_none, "expected a positive number or \"none\"")

    def convert(self, value, context):
        return None if value == "none" else float(value)


class _IMNames(Rule):
    """A list of IM names, converted to their canonical spelling (``parse_im``)."""

    def __init__(self):
        super().__init__(lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v),
                         "expected a list of IM names")

    def convert(self, value, context):
        out = []
        for v in value:
            try:
                out.append(parse_im(v))
            except ValueError as exc:
                raise Invalid(str(exc)) from None
        return out


class _Branches(Constraint):
    """Logic-tree branches (``"source_branches"`` or ``"gmm_branches"``), checked by :func:`_branches`."""

    def __init__(self, kind):
        super().__init__()
        self.kind = kind

    def holds(self, value):
        return True

    def convert(self, value, context):
        return _branches(self.kind, value, context["base"])


_STR = (Text(),)
_BOOL = (Boolean(),)
_INT = (Integer(),)
_FLOAT = (Real(finite=True),)
_FLOATS = (ListOf(Real(), "expected a list of numbers"),
           ListOf(Real(finite=True), "expected finite numbers", show_value=False))
_PATH = (Text("expected a file path string", non_empty=True), _ResolvedPath())
_POSITIVE = Interval(0, None, closed="neither")
_NON_NEGATIVE = Interval(0, None)
_POSITIVE_INT = Interval(1, None, message="expected an integer >= 1")
#: Simulated years: beyond 1e8 only memory grows (1e8 years put the 1-in-10,000-year loss within ~1 %,
#: pipeline.stages.sizes.MAX_YEARS).
_YEARS = Interval(1, 100_000_000, message="expected an integer from 1 to 100,000,000: the exceedance probability "
                  "of the 1-in-10,000-year loss has a standard error of 1 % of itself at 1e8 years")
_PROBABILITY = Interval(0, 1, closed="neither", message="expected a probability in (0, 1)")
_CORRELATION = Interval(0, 1, message="expected a correlation coefficient in [0, 1]")
_DISCOUNT_RATE = Interval(0, 1, closed="left", message="expected a discount rate in [0, 1)")
_RETURN_PERIODS = (ListOf(message="expected at least one return period", min_len=1),
                   ListOf(Interval(1, None, closed="neither"), "return periods must be greater than 1 yr"),
                   ListOf(message="return periods must be strictly increasing", increasing=True))
_RATIOS = ListOf(Interval(0, 1), "expected at least 2 strictly increasing loss ratios in [0, 1]", min_len=2,
                 increasing=True)
_QUANTILES = ListOf(Interval(0, 1, closed="neither"), "expected strictly increasing probabilities in (0, 1)",
                    increasing=True)
_LEVELS = ListOf(_POSITIVE, "expected at least 2 strictly increasing positive levels", min_len=2, increasing=True)
#: Entries are checked with their lines by _alternatives.
_ALTERNATIVE_LIST = (ListOf(Rule(lambda v: isinstance(v, dict), "a table"),
                            "expected [[scenario.alternatives]] tables", show_value=False),)
#: An empty string (start a local cluster) or a Dask scheduler address such as ``tcp://10.0.0.5:8786``.
_DASK_ADDRESS = Pattern(r"^(tcp|tls|ucx|inproc)://\S+$", "expected a Dask scheduler address such as "
                        "'tcp://10.0.0.5:8786' (or \"\" for a local cluster)", allow_empty=True)


def _dask_address(v):
    """None for ``""`` (a local cluster) or a Dask scheduler address, else what is expected (used by the CLI)."""
    return None if _DASK_ADDRESS.holds(v) else _DASK_ADDRESS.describe()


def _key(kind, default=REQUIRED, *checks, choices=None, help=""):
    """A :class:`~quakefolio.core.validation.Field`: type rules, then the choice set, then the checks."""
    rules = tuple(kind) + ((OneOf(choices),) if choices else ()) + tuple(checks)
    return Field(rules, default, help)


#: Default IM level grid for computed hazard [g]: 40 levels log-spaced from 5e-4 to 4 g.
DEFAULT_LEVELS_G = [float(f"{5e-4 * (4.0 / 5e-4) ** (i / 39):.6g}") for i in range(40)]


SCHEMA = {
    "scenario": {
        "name": _key(_STR),
        "description": _key(_STR, ""),
        "currency": _key(_STR, "USD"),
        "horizon_yr": _key(_FLOAT, 50.0, _POSITIVE, help="exposure period for N-year probabilities [yr]"),
        "alternatives": _key(_ALTERNATIVE_LIST, [], help="retrofit what-if: [[scenario.alternatives]] tables"),
        "discount_rate": _key(_FLOAT, 0.03, _DISCOUNT_RATE, help="annual discount rate of avoided losses [-]"),
        "benefit_horizon_yr": _key(_FLOAT, 50.0, _POSITIVE, help="years over which avoided losses count [yr]"),
        "value_per_avoided_casualty": _key((_PositiveOrNone(),), None,
                                           help="life-safety benefit of the what-if [currency per casualty]; "
                                                "none: benefit-cost counts losses only"),
    },
    "screening": {
        "collapse_target_prob": _key(_FLOAT, 0.01, _PROBABILITY, help="target collapse probability [-]"),
        "collapse_target_years": _key(_FLOAT, 50.0, _POSITIVE, help="period of the target probability [yr]"),
        "target_basis": _key(_STR, "", help="where the collapse target comes from, in words (shown in the report)"),
        "rt_beta": _key(_FLOAT, 0.6, _POSITIVE, help="dispersion of the generic collapse fragility [-]"),
        "rt_prob_at_im": _key(_FLOAT, 0.10, _PROBABILITY,
                              help="collapse probability of the generic fragility at the risk-targeted IM [-]"),
    },
    "hazard": {
        "mode": _key(_STR, choices=("ingest", "compute")),
        "curves_file": _key(_PATH, None),
        "im_unit": _key(_STR, "g", choices=tuple(IM_UNITS_TO_G)),
        "statistic": _key(_STR, "mean"),
        "return_periods_yr": _key(_FLOATS, [100.0, 475.0, 2475.0], *_RETURN_PERIODS),
        "rate_floor": _key(_FLOAT, 1e-6, _POSITIVE, help="rates below are not reported as design values [1/yr]"),
        "max_site_distance_km": _key(_FLOAT, 5.0, _POSITIVE),
        "period_interpolation": _key(_BOOL, True),
        "source_models": _key((_Branches("source_branches"),), None, help="compute mode: [{file, weight, id}]"),
        "gmm_branches": _key((_Branches("gmm_branches"),), None, help="compute mode: [{model, weight}]"),
        "region_gmm_branches": _key((RegionBranches(),), {}, help="compute mode: {region = [{model, weight}]}"),
        "site_backarc": _key(_BOOL, False, help="sites without an exposure 'backarc' value lie in the backarc"),
        "truncation_sigma": _key((_PositiveOrNone(),), 3.0, help="residual truncation [sigma] or \"none\""),
        "integration_distance_km": _key(_FLOAT, 200.0, _POSITIVE),
        "ims": _key((_IMNames(),), [], help="IMs to compute besides those the fragility library needs"),
        "im_levels_g": _key(_FLOATS, DEFAULT_LEVELS_G, _LEVELS),
        "fractiles": _key(_FLOATS, [0.16, 0.5, 0.84], _QUANTILES),
        "site_spacing_km": _key(_FLOAT, 0.0, _NON_NEGATIVE, help="0: a site per unique asset location"),
        "default_vs30_mps": _key(_FLOAT, 760.0, _POSITIVE, Rule(lambda v: vs30_problem(v) is None, vs30_problem,
                                                                 show_value=False)),
        "region": _key(_STR, "global"),
        "disaggregation": _key(_BOOL, True),
        "cms_conditioning_ims": _key((_IMNames(),), [], help="conditional mean spectrum: IMs it is conditioned on "
                                     "(checked by pipeline.stages.spectrum); [] (default): none"),
        "cms_return_periods_yr": _key(_FLOATS, [475.0, 2475.0], *_RETURN_PERIODS),
        "propagate_branches": _key(_BOOL, False, help="also give damage and EAL fractiles over branches"),
        "fractile_combinations_max": _key(_INT, 1000, Interval(2, 1_000_000, message="expected an integer from 2 to "
                                          "1,000,000"), help="logic-tree combinations enumerated for the fractiles; "
                                          "above: a seeded sample of this many"),
    },
    "portfolio": {
        "event_based": _key(_BOOL, None, help="event-based portfolio loss (default: on in compute mode)"),
        "years": _key(_INT, 10000, _YEARS, help="simulated years (at most 1e8)"),
        "seed": _key(_INT, 20261201, _NON_NEGATIVE, help="seed of every random draw"),
        "source_branch": _key(_STR, "", help="\"\" (default): every source-model and GMM branch by weight, one "
                              "branch combination per simulated year; a source branch id: that branch only, GMM "
                              "drawn per event (per-branch mode, for sensitivity)"),
        "spatial_correlation": _key(_BOOL, True),
        "cross_im_correlation": _key(_BOOL, True),
        "correlation_range": _key(_STR, "mixed_site_conditions",
                                  choices=("mixed_site_conditions", "clustered_site_conditions"),
                                  help="range of the spatial correlation of within-event residuals: Jayaram & "
                                       "Baker (2009) for sites of mixed Vs30, or for sites whose Vs30 values "
                                       "cluster in space (a longer range at short periods)"),
        "loss_model": _key(_STR, "mean_damage_ratio", choices=("mean_damage_ratio", "sampled_damage")),
        "secondary_correlation": _key(_FLOAT, 0.3, _CORRELATION,
                                      help="sampled damage: share of damage and loss-ratio uncertainty common to a "
                                           "group in an event [-] (0.3: an assumption, not a published value)"),
        "secondary_group": _key((Text("expected an exposure column name", non_empty=True),), "building_class",
                                help="exposure column whose values group assets sharing that uncertainty"),
        "return_periods_yr": _key(_FLOATS, [100.0, 250.0, 475.0, 2475.0], *_RETURN_PERIODS),
    },
    "programme": {
        "group_terms_file": _key(_PATH, None, help="per terms_group: deductible and limit per event (CSV or Parquet)"),
        "occurrence_layers": _key((_Layers("occurrence"),), [],
                                  help="per-event layers [{id, attachment, limit, reinstatements}]"),
        "aggregate_layers": _key((_Layers("aggregate"),), [], help="annual aggregate layers [{id, attachment, limit}]"),
    },
    "exposure": {
        "file": _key(_PATH),
        "occupancy_periods": _key((_OccupancyPeriods(),), None,
                                  help="time-of-day occupancy [{name, hours, present}]; none: all occupants present"),
    },
    "fragility": {
        "library": _key(_PATH),
        "crossing": _key(_STR, "reject", choices=("reject", "envelope")),
        "tail": _key(_STR, "extrapolate", choices=("extrapolate", "truncate")),
        "tail_share_warning": _key(_FLOAT, 0.05, _PROBABILITY),
    },
    "output": {
        "folder": _key(_PATH, "output"),
        "loss_curve_ratios": _key(_FLOATS, [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5,
                                             0.6, 0.7, 0.8, 0.9, 0.95, 0.99], _RATIOS),
        "top_assets": _key(_INT, 10, _POSITIVE_INT),
        "report": _key(_BOOL, True, help="write report.html into the run folder"),
        "breakdown_columns": _key(BREAKDOWN_COLUMNS, [], help="exposure columns to break EAL, AAL, PML down by"),
    },
    "execution": {
        "backend": _key(_STR, "local", choices=("local", "dask")),
        "address": _key(_STR, "", _DASK_ADDRESS, help="Dask scheduler, e.g. tcp://10.0.0.5:8786"),
        "max_workers": _key(_INT, 2, _POSITIVE_INT),
        "block_size": _key(_INT, 20000, _POSITIVE_INT, help="(site, class) pairs per task"),
        "site_block_size": _key(_INT, 64, _POSITIVE_INT, help="hazard sites per task"),
        "event_block_size": _key(_INT, 1024, _POSITIVE_INT, help="events per task (whole blocks of 256)"),
        "cache": _key(_BOOL, True, help="reuse stage results whose inputs did not change"),
    },
}


def _frozen(value):
    """Lists as tuples and tables as read-only mappings, recursively."""
    if isinstance(value, list):
        return tuple(_frozen(v) for v in value)
    if isinstance(value, dict):
        return MappingProxyType({k: _frozen(v) for k, v in value.items()})
    return value


class _Section:
    """Shared constructor of the frozen settings classes."""

    @classmethod
    def from_mapping(cls, values):
        """The settings object of one resolved section.

        Parameters
        ----------
        values : dict
            ``Config.sections[section]``.

        Returns
        -------
        The settings object; lists become tuples and tables read-only mappings.
        """
        return cls(**{f.name: _frozen(values[f.name]) for f in fields(cls)})


@dataclass(frozen=True)
class ScenarioSettings(_Section):
    """``[scenario]``: what is assessed and how retrofit benefits are counted."""

    name: str  #: title of the scenario
    description: str  #: free text
    currency: str  #: currency of every money amount (e.g. ``"USD"``)
    horizon_yr: float  #: exposure period of N-year probabilities [yr]
    alternatives: tuple  #: retrofit what-if alternatives (read-only mappings, keys of ALTERNATIVE_KEYS)
    discount_rate: float  #: annual discount rate of avoided losses [-]
    benefit_horizon_yr: float  #: years over which avoided losses count [yr]
    value_per_avoided_casualty: float | None  #: life-safety benefit per avoided casualty [currency], or None


@dataclass(frozen=True)
class ScreeningSettings(_Section):
    """``[screening]``: collapse-risk target and the generic fragility of the risk-targeted IM."""

    collapse_target_prob: float  #: target collapse probability [-]
    collapse_target_years: float  #: period of the target probability [yr]
    target_basis: str  #: where the target comes from, in words ("": not stated)
    rt_beta: float  #: dispersion of the generic collapse fragility [-]
    rt_prob_at_im: float  #: collapse probability of the generic fragility at the risk-targeted IM [-]


@dataclass(frozen=True)
class HazardSettings(_Section):
    """``[hazard]``: ingested or computed site hazard."""

    mode: str  #: ``"ingest"`` or ``"compute"``
    curves_file: Path | None  #: tabulated hazard curves (ingest mode), resolved path
    im_unit: str  #: unit of the tabulated IM levels: ``"g"``, ``"m/s2"`` or ``"cm/s2"``
    statistic: str  #: statistic of the tabulated curves used (e.g. ``"mean"``)
    return_periods_yr: tuple  #: return periods of the design values [yr]
    rate_floor: float  #: rates below are not reported as design values [1/yr]
    max_site_distance_km: float  #: largest asset-to-site distance [km]
    period_interpolation: bool  #: interpolate curves across periods for untabulated IMs
    source_models: tuple | None  #: source-model branches ``{file, weight, id}`` (compute mode)
    gmm_branches: tuple | None  #: ground-motion model branches ``{model, weight, id}`` (compute mode)
    region_gmm_branches: dict  #: other tectonic regions' branches (:mod:`quakefolio.pipeline.io.gmm_regions`)
    site_backarc: bool  #: default backarc flag of subduction sites (forearc when false)
    truncation_sigma: float | None  #: residual truncation [sigma], None for no truncation
    integration_distance_km: float  #: site-rupture distance cut-off [km]
    ims: tuple  #: IMs computed besides those the fragility library needs
    im_levels_g: tuple  #: IM level grid of computed curves [g]
    fractiles: tuple  #: logic-tree fractiles [-]
    site_spacing_km: float  #: grid spacing of hazard sites [km], 0 for a site per asset location
    default_vs30_mps: float  #: Vs30 of assets without one [m/s]
    region: str  #: ground-motion model region
    disaggregation: bool  #: compute the disaggregation table
    cms_conditioning_ims: tuple  #: IMs the conditional mean spectrum is conditioned on (empty: none)
    cms_return_periods_yr: tuple  #: return periods of the conditional mean spectrum [yr]
    propagate_branches: bool  #: also give damage and EAL fractiles over branches
    fractile_combinations_max: int  #: combinations enumerated for the fractiles; above: a sample of this many


@dataclass(frozen=True)
class PortfolioSettings(_Section):
    """``[portfolio]``: the event-based portfolio simulation."""

    event_based: bool  #: simulate events (default: on in compute mode)
    years: int  #: simulated years [yr]
    seed: int  #: seed of every random draw
    source_branch: str  #: "" for the whole logic tree, else the one source-model branch of the event set
    spatial_correlation: bool  #: spatially correlated within-event residuals
    cross_im_correlation: bool  #: correlated residuals across IMs
    correlation_range: str  #: ``"mixed_site_conditions"`` or ``"clustered_site_conditions"`` (Jayaram & Baker 2009)
    loss_model: str  #: ``"mean_damage_ratio"`` or ``"sampled_damage"``
    secondary_correlation: float  #: within-group correlation of sampled damage and loss ratios [-]
    secondary_group: str  #: exposure column grouping assets that share that uncertainty
    return_periods_yr: tuple  #: return periods of PML and TVaR [yr]


@dataclass(frozen=True)
class ProgrammeSettings(_Section):
    """``[programme]``: terms above the building (group terms, occurrence and aggregate layers)."""

    group_terms_file: Path | None  #: group terms per ``terms_group`` (resolved path), None for none
    occurrence_layers: tuple  #: ``{id, attachment, limit, reinstatements}`` (limit None: unlimited)
    aggregate_layers: tuple  #: ``{id, attachment, limit}`` on the annual sum (limit None: unlimited)


@dataclass(frozen=True)
class ExposureSettings(_Section):
    """``[exposure]``: the asset file."""

    file: Path  #: exposure table (CSV or Parquet), resolved path
    occupancy_periods: tuple | None  #: periods of the day ``{name, hours [h], present [-]}``, or None


@dataclass(frozen=True)
class FragilitySettings(_Section):
    """``[fragility]``: the library and how its curves are used."""

    library: Path  #: fragility library file (TOML), resolved path
    crossing: str  #: ``"reject"`` or ``"envelope"`` for crossing damage-state curves
    tail: str  #: ``"extrapolate"`` or ``"truncate"`` beyond the tabulated hazard
    tail_share_warning: float  #: share of a damage-state rate from the tails that warns [-]


@dataclass(frozen=True)
class OutputSettings(_Section):
    """``[output]``: where and what is written."""

    folder: Path  #: output folder, resolved path
    loss_curve_ratios: tuple  #: loss ratios of the per-asset loss curves [-]
    top_assets: int  #: assets listed in the summary
    report: bool  #: write report.html into the run folder
    breakdown_columns: tuple  #: exposure columns the results are broken down by


@dataclass(frozen=True)
class ExecutionSettings(_Section):
    """``[execution]``: where and in which chunks the work runs."""

    backend: str  #: ``"local"`` or ``"dask"``
    address: str  #: Dask scheduler address ("" for a local cluster)
    max_workers: int  #: worker threads of the local backend
    block_size: int  #: (site, class) pairs per task
    site_block_size: int  #: hazard sites per task
    event_block_size: int  #: events per task (whole blocks of 256)
    cache: bool  #: reuse stage results whose inputs did not change


#: Section name -> its frozen settings class.
SETTINGS_CLASSES = {"scenario": ScenarioSettings, "screening": ScreeningSettings, "hazard": HazardSettings,
                    "portfolio": PortfolioSettings, "programme": ProgrammeSettings, "exposure": ExposureSettings, "fragility": FragilitySettings,
                    "output": OutputSettings, "execution": ExecutionSettings}


#: One :class:`~quakefolio.core.validation.Schema` per section: how its keys are checked and reported.
SECTION_SCHEMAS = {sec: Schema(fields, cutoff=0.5, valid_label="valid",
                               missing="missing required key '{key}' in [" + sec + "]")
                   for sec, fields in SCHEMA.items()}


@dataclass
class Config:
    """Resolved run configuration: ``sections[section][key]`` plus provenance.

    Each section is also available as a frozen settings object with typed attributes:
    ``cfg.hazard.mode``, ``cfg.portfolio.years``, ``cfg.execution.block_size`` (see
    :class:`HazardSettings` and the other ``*Settings`` classes).  The attribute view is
    built from ``sections`` on first access and kept: a Config is not changed after
    :func:`load_config` returns it, so both views always agree.
    """

    path: Path
    sections: dict
    sha256: str
    raw: dict = field(default_factory=dict)

    def __getitem__(self, section):
        return self.sections[section]

    @property
    def base(self):
        """Folder of the config file; relative input paths resolve against it."""
        return self.path.parent

    def resolved(self):
        """JSON-serialisable resolved config (paths as strings).

        Returns
        -------
        dict
            ``{section: {key: value}}`` after a JSON round trip (``str`` for paths and other
            values JSON cannot encode), as stored in the run manifest.
        """
        return json.loads(json.dumps(self.sections, default=str))

    def settings(self, section):
        """The frozen settings object of ``section`` (e.g. ``"hazard"``).

        Parameters
        ----------
        section : str
            A section name of :data:`SCHEMA`.

        Returns
        -------
        ScenarioSettings, ScreeningSettings, HazardSettings, PortfolioSettings,
        ProgrammeSettings, ExposureSettings, FragilitySettings, OutputSettings or ExecutionSettings
        """
        cache = self.__dict__.setdefault("_settings", {})
        if section not in cache:
            cache[section] = SETTINGS_CLASSES[section].from_mapping(self.sections[section])
        return cache[section]

    def __getstate__(self):
        """Pickled without the settings objects (read-only mappings do not pickle; rebuilt on access)."""
        return {k: v for k, v in self.__dict__.items() if k != "_settings"}

    scenario = property(lambda self: self.settings("scenario"), doc="[scenario] as ScenarioSettings")
    screening = property(lambda self: self.settings("screening"), doc="[screening] as ScreeningSettings")
    hazard = property(lambda self: self.settings("hazard"), doc="[hazard] as HazardSettings")
    portfolio = property(lambda self: self.settings("portfolio"), doc="[portfolio] as PortfolioSettings")
    programme = property(lambda self: self.settings("programme"), doc="[programme] as ProgrammeSettings")
    exposure = property(lambda self: self.settings("exposure"), doc="[exposure] as ExposureSettings")
    fragility = property(lambda self: self.settings("fragility"), doc="[fragility] as FragilitySettings")
    output = property(lambda self: self.settings("output"), doc="[output] as OutputSettings")
    execution = property(lambda self: self.settings("execution"), doc="[execution] as ExecutionSettings")


#: keys of earlier versions: (section, old key) -> the hint that replaces "did you mean"
RENAMED = {("portfolio", "vs30_clustering"): "; renamed: correlation_range = \"clustered_site_conditions\" "
                                             "(true) or \"mixed_site_conditions\" (false, the default)"}


def _suggest(name, valid):
    return did_you_mean(name, valid, cutoff=0.5, otherwise=f"; valid: {', '.join(valid)}")


def _branch_weight(i, entry):
    weight = entry.get("weight")
    if isinstance(weight, bool) or not isinstance(weight, (int, float)) or not 0 < weight <= 1:
        raise Invalid(f"branch {i + 1}: weight must be a number in (0, 1], got {weight!r}")
    return float(weight)


def _source_branch(i, entry, base):
    weight = _branch_weight(i, entry)
    file = entry.get("file")
    if not isinstance(file, str) or not file.strip():
        raise Invalid(f"branch {i + 1}: 'file' must be a path string")
    p = _resolve(file, base)
    bid = entry.get("id", p.stem)
    if not isinstance(bid, str) or not bid:
        raise Invalid(f"branch {i + 1}: 'id' must be a non-empty string")
    return {"file": p, "weight": weight, "id": bid}


def _gmm_branch(i, entry, base):
    from quakefolio.core.gmm import GMM_REGISTRY, models_for_region

    weight = _branch_weight(i, entry)
    model = entry.get("model")
    valid = models_for_region("active_crustal")  # source models hold active crustal sources only
    if model not in valid:
        what = "unknown" if model not in GMM_REGISTRY else "not an active-crustal"
        raise Invalid(f"branch {i + 1}: {what} ground-motion model {model!r}; valid: {', '.join(valid)}")
    return {"model": model, "weight": weight, "id": model}


_BRANCH_KINDS = {"source_branches": (("file", "weight", "id"), _source_branch),
                 "gmm_branches": (("model", "weight"), _gmm_branch)}


def _branches(kind, value, base):
    """Logic-tree branches: a list of tables with a weight each; weights sum to 1.

    Parameters
    ----------
    kind : {"source_branches", "gmm_branches"}
        Which tree: source-model files or ground-motion models.
    value : object
        The parsed TOML value.
    base : Path
        Folder relative file names are resolved against.

    Returns
    -------
    list of dict
        ``{"file", "weight", "id"}`` or ``{"model", "weight", "id"}`` per branch.

    Raises
    ------
    quakefolio.core.validation.Invalid
        With the message; the caller adds file, line and key.
    """
    keys, build = _BRANCH_KINDS[kind]
    if not isinstance(value, list) or not value or not all(isinstance(v, dict) for v in value):
        raise Invalid(f"expected a list of tables like {{ {keys[0]} = ..., weight = ... }}")
    out = []
    for i, entry in enumerate(value):
        for key in entry:
            if key not in keys:
                raise Invalid(f"branch {i + 1}: unknown key '{key}'{_suggest(key, keys)}")
        out.append(build(i, entry, base))
    total = sum(b["weight"] for b in out)
    if abs(total - 1.0) > 1e-6:
        raise Invalid(f"branch weights must sum to 1, got {total:.6g}")
    ids = [b["id"] for b in out]
    if len(set(ids)) != len(ids):
        raise Invalid(f"branch ids must be unique, got {ids}")
    return out


#: Keys of one ``[[scenario.alternatives]]`` table (retrofit what-if).
def _check_sections(data, path, text):
    """Unknown sections and keys (with a hint) and sections that are not tables, in file order."""
    for sec, body in data.items():
        if sec not in SCHEMA:
            raise InputError(path, f"unknown section [{sec}]{_suggest(sec, SCHEMA)}",
                             row=locate_toml_line(text, (sec,)), column=sec)
        if not isinstance(body, dict):
            raise InputError(path, f"[{sec}] must be a table", row=locate_toml_line(text, (), sec), column=sec)
        for key in body:
            if key not in SCHEMA[sec]:
                hint = RENAMED.get((sec, key)) or _suggest(key, SCHEMA[sec])
                raise toml_place(path, text, (sec,), sec).error(f"unknown key{hint}", key)


def _section_values(sec, body, path, text, base):
    """One section after its schema: converted values, defaults filled in (paths resolved)."""
    out = validate_table(body, SECTION_SCHEMAS[sec], toml_place(path, text, (sec,), sec), {"base": base})
    for key, spec in SCHEMA[sec].items():
        if key not in body and spec.default is not None and isinstance(spec.rules[-1], _ResolvedPath):
            out[key] = (base / spec.default).resolve()
    return out


def _cross_checks(sections, path, text):
    """Checks across keys: what each hazard mode needs, the output folder, event-based default."""
    def error(message, sec, key, column=None):
        return InputError(path, message, row=locate_toml_line(text, (sec,), key), column=column or f"{sec}.{key}")

    hz = sections["hazard"]
    if hz["mode"] == "ingest" and hz["curves_file"] is None:
        raise error("mode = \"ingest\" needs curves_file", "hazard", "mode", "hazard.curves_file")
    out = sections["output"]["folder"]
    if out.exists() and not out.is_dir():
        raise error(f"output folder {str(out)!r} is an existing file; name a folder", "output", "folder")
    pf = sections["portfolio"]
    if pf["event_based"] is None:
        pf["event_based"] = hz["mode"] == "compute"
    elif pf["event_based"] and hz["mode"] != "compute":
        raise error("event_based = true needs [hazard] mode = \"compute\" (events come from the source model)",
                    "portfolio", "event_based")
    _programme_checks(sections, error)
    if hz["mode"] == "compute":
        for key in ("source_models", "gmm_branches"):
            if hz[key] is None:
                raise error(f"mode = \"compute\" needs {key}", "hazard", "mode", f"hazard.{key}")


def _programme_checks(sections, error):
    """Layer ids unique across both kinds; programme terms need the event-based stage."""
    pr = sections["programme"]
    occ = {layer["id"] for layer in pr["occurrence_layers"]}
    both = sorted(occ & {layer["id"] for layer in pr["aggregate_layers"]})
    if both:
        raise error(f"layer id {both[0]!r} is used by an occurrence and an aggregate layer", "programme",
                    "aggregate_layers")
    used = [k for k in ("group_terms_file", "occurrence_layers", "aggregate_layers") if pr[k]]
    if used and not sections["portfolio"]["event_based"]:
        raise error(f"[programme] {used[0]} needs the event-based stage ([portfolio] event_based = true with "
                    "[hazard] mode = \"compute\")", "programme", used[0])


def load_config(path):
    """Read, validate and resolve a run config file.

    Parameters
    ----------
    path : str or Path
        The ``quakefolio.toml`` file.

    Returns
    -------
    Config
        Sections as mappings (``cfg["hazard"]["mode"]``) and as frozen settings objects
        (``cfg.hazard.mode``); relative paths resolved against the file's folder.

    Raises
    ------
    InputError
        On any problem, naming file, line and key.
    """
    path = Path(path).resolve() if Path(path).exists() else Path(path)
    text, data, digest = read_toml(path)
    base = path.parent
    _check_sections(data, path, text)
    sections = {sec: _section_values(sec, data.get(sec, {}), path, text, base) for sec in SCHEMA}
    sections["scenario"]["alternatives"] = parse_alternatives(sections["scenario"]["alternatives"], path, text, base)
    _cross_checks(sections, path, text)
    return Config(path=path, sections=sections, sha256=digest, raw=data)


def sha256_file(path, chunk=1 << 20):
    """sha256 hex digest of a file's bytes.

    Parameters
    ----------
    path : path-like
        The file to hash.
    chunk : int
        Read size [bytes] (default 1 MiB).

    Returns
    -------
    str
        64 hex characters.
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            b = fh.read(chunk)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def resolve_execution(config, executor=None, address=None):
    """``(backend, address)`` from the config's ``[execution]``, overridden by the command line.

    ``executor`` (``"local"`` or ``"dask"``) replaces ``backend``; ``address`` replaces
    ``address`` and alone implies the Dask backend.  An empty address with the Dask
    backend means a local cluster (``quakefolio.pipeline.orchestration.LOCAL_CLUSTER``).

    Parameters
    ----------
    config : Config
        The loaded run configuration.
    executor : {"local", "dask"}, optional
        The command line's ``--executor``.
    address : str, optional
        The command line's ``--address`` of a Dask scheduler.

    Returns
    -------
    backend : {"local", "dask"}
    address : str
        Scheduler address; empty for the local backend (and for a local Dask cluster).
    """
    ex = config.execution
    backend = executor or ("dask" if address else ex.backend)
    if backend != "dask":
        return "local", ""
    return "dask", address if address is not None else ex.address
