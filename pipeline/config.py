"""Run configuration (``quakefolio.toml``): schema, defaults, validation.

Every key is declared once in :data:`SCHEMA` with its type, default and constraint.
Unknown sections and keys are errors that suggest the nearest valid name; every error
names the file, the line and the key.  Paths are resolved relative to the config file.
"""
from __future__ import annotations

import difflib
import hashlib
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.ims import parse_im
from quakefolio.fragility.library import read_toml

__all__ = ["Config", "load_config", "SCHEMA", "IM_UNITS_TO_G", "resolve_execution"]

#: Conversion factors from accepted IM-level units to g (standard gravity 9.80665 m/s2,
#: CGPM 1901 / ISO 80000-3).
IM_UNITS_TO_G = {"g": 1.0, "m/s2": 1.0 / 9.80665, "cm/s2": 1.0 / 980.665}


class _Key:
    """One config key: expected kind, default (``REQUIRED`` if none) and a check."""

    REQUIRED = object()

    def __init__(self, kind, default=REQUIRED, check=None, choices=None, help=""):
        self.kind, self.default, self.check, self.choices, self.help = kind, default, check, choices, help


def _positive(v):
    return None if v > 0 else "expected a positive number"


def _positive_int(v):
    return None if v >= 1 else "expected an integer >= 1"


def _return_periods(v):
    if not v:
        return "expected at least one return period"
    if any(x <= 1 for x in v):
        return "return periods must be greater than 1 yr"
    if sorted(set(v)) != list(v):
        return "return periods must be strictly increasing"
    return None


def _ratios(v):
    if len(v) < 2 or any(not 0 <= x <= 1 for x in v) or sorted(set(v)) != list(v):
        return "expected at least 2 strictly increasing loss ratios in [0, 1]"
    return None


def _probability(v):
    return None if 0 < v < 1 else "expected a probability in (0, 1)"


def _non_negative(v):
    return None if v >= 0 else "expected a non-negative number"


def _discount_rate(v):
    return None if 0 <= v < 1 else "expected a discount rate in [0, 1)"


def _quantiles(v):
    if any(not 0 < q < 1 for q in v) or sorted(set(v)) != list(v):
        return "expected strictly increasing probabilities in (0, 1)"
    return None


def _dask_address(v):
    """An empty string (start a local cluster) or a Dask scheduler address such as ``tcp://10.0.0.5:8786``."""
    if not v or re.match(r"^(tcp|tls|ucx|inproc)://\S+$", v):
        return None
    return "expected a Dask scheduler address such as 'tcp://10.0.0.5:8786' (or \"\" for a local cluster)"


def _levels(v):
    if len(v) < 2 or any(x <= 0 for x in v) or sorted(set(v)) != list(v):
        return "expected at least 2 strictly increasing positive levels"
    return None


#: Default IM level grid for computed hazard [g]: 40 levels log-spaced from 5e-4 to 4 g.
DEFAULT_LEVELS_G = [float(f"{5e-4 * (4.0 / 5e-4) ** (i / 39):.6g}") for i in range(40)]


SCHEMA = {
    "scenario": {
        "name": _Key(str),
        "description": _Key(str, ""),
        "currency": _Key(str, "USD"),
        "horizon_yr": _Key(float, 50.0, _positive, help="exposure period for N-year probabilities [yr]"),
        "alternatives": _Key("alternatives", [], help="retrofit what-if: [[scenario.alternatives]] tables"),
        "discount_rate": _Key(float, 0.03, _discount_rate, help="annual discount rate of avoided losses [-]"),
        "benefit_horizon_yr": _Key(float, 50.0, _positive, help="years over which avoided losses count [yr]"),
    },
    "screening": {
        "collapse_target_prob": _Key(float, 0.01, _probability, help="target collapse probability [-]"),
        "collapse_target_years": _Key(float, 50.0, _positive, help="period of the target probability [yr]"),
        "rt_beta": _Key(float, 0.6, _positive, help="dispersion of the generic collapse fragility [-]"),
        "rt_prob_at_im": _Key(float, 0.10, _probability,
                              help="collapse probability of the generic fragility at the risk-targeted IM [-]"),
    },
    "hazard": {
        "mode": _Key(str, choices=("ingest", "compute")),
        "curves_file": _Key("path", None),
        "im_unit": _Key(str, "g", choices=tuple(IM_UNITS_TO_G)),
        "statistic": _Key(str, "mean"),
        "return_periods_yr": _Key("floats", [100.0, 475.0, 2475.0], _return_periods),
        "rate_floor": _Key(float, 1e-6, _positive, help="rates below are not reported as design values [1/yr]"),
        "max_site_distance_km": _Key(float, 5.0, _positive),
        "period_interpolation": _Key(bool, True),
        "source_models": _Key("source_branches", None, help="compute mode: [{file, weight, id}]"),
        "gmm_branches": _Key("gmm_branches", None, help="compute mode: [{model, weight}]"),
        "truncation_sigma": _Key("float_or_none", 3.0, help="residual truncation [sigma] or \"none\""),
        "integration_distance_km": _Key(float, 200.0, _positive),
        "ims": _Key("ims", [], help="IMs to compute besides those the fragility library needs"),
        "im_levels_g": _Key("floats", DEFAULT_LEVELS_G, _levels),
        "fractiles": _Key("floats", [0.16, 0.5, 0.84], _quantiles),
        "site_spacing_km": _Key(float, 0.0, _non_negative, help="0: a site per unique asset location"),
        "default_vs30_mps": _Key(float, 760.0, _positive),
        "region": _Key(str, "global"),
        "disaggregation": _Key(bool, True),
        "propagate_branches": _Key(bool, False, help="also give damage and EAL fractiles over branches"),
    },
    "portfolio": {
        "event_based": _Key(bool, None, help="event-based portfolio loss (default: on in compute mode)"),
        "years": _Key(int, 10000, _positive_int, help="simulated years"),
        "seed": _Key(int, 20261201, _non_negative, help="seed of every random draw"),
        "source_branch": _Key(str, "", help="source-model branch of the event set (default: highest weight)"),
        "spatial_correlation": _Key(bool, True),
        "cross_im_correlation": _Key(bool, True),
        "vs30_clustering": _Key(bool, False, help="Jayaram & Baker (2009) case with Vs30 clustering"),
        "loss_model": _Key(str, "mean_damage_ratio", choices=("mean_damage_ratio", "sampled_damage")),
        "return_periods_yr": _Key("floats", [100.0, 250.0, 475.0, 2475.0], _return_periods),
    },
    "exposure": {
        "file": _Key("path"),
    },
    "fragility": {
        "library": _Key("path"),
        "crossing": _Key(str, "reject", choices=("reject", "envelope")),
        "tail": _Key(str, "extrapolate", choices=("extrapolate", "truncate")),
        "tail_share_warning": _Key(float, 0.05, _probability),
    },
    "output": {
        "folder": _Key("path", "output"),
        "loss_curve_ratios": _Key("floats", [0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5,
                                             0.6, 0.7, 0.8, 0.9, 0.95, 0.99], _ratios),
        "top_assets": _Key(int, 10, _positive_int),
        "report": _Key(bool, True, help="write report.html into the run folder"),
    },
    "execution": {
        "backend": _Key(str, "local", choices=("local", "dask")),
        "address": _Key(str, "", _dask_address, help="Dask scheduler, e.g. tcp://10.0.0.5:8786"),
        "max_workers": _Key(int, 2, _positive_int),
        "block_size": _Key(int, 20000, _positive_int, help="(site, class) pairs per task"),
        "site_block_size": _Key(int, 64, _positive_int, help="hazard sites per task"),
        "event_block_size": _Key(int, 1024, _positive_int, help="events per task (whole blocks of 256)"),
        "cache": _Key(bool, True, help="reuse stage results whose inputs did not change"),
    },
}


@dataclass
class Config:
    """Resolved run configuration: ``sections[section][key]`` plus provenance."""

    path: Path
    sections: dict
    sha256: str
    raw: dict = field(default_factory=dict)

    def __getitem__(self, section):
        return self.sections[section]

    @property
    def base(self):
        return self.path.parent

    def resolved(self):
        """JSON-serialisable resolved config (paths as strings)."""
        return json.loads(json.dumps(self.sections, default=str))


def _suggest(name, valid):
    close = difflib.get_close_matches(name, list(valid), n=1, cutoff=0.5)
    if close:
        return f"; did you mean '{close[0]}'?"
    return f"; valid: {', '.join(valid)}"


def _coerce(spec, value, path, row, column, base):
    def fail(msg):
        raise InputError(path, msg, row=row, column=column)

    kind = spec.kind
    if kind is str:
        if not isinstance(value, str):
            fail(f"expected a string, got {value!r}")
        if spec.choices and value not in spec.choices:
            fail(f"expected one of {', '.join(repr(c) for c in spec.choices)}, got {value!r}")
        return value
    if kind is bool:
        if not isinstance(value, bool):
            fail(f"expected true or false, got {value!r}")
        return value
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            fail(f"expected an integer, got {value!r}")
        return value
    if kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            fail(f"expected a finite number, got {value!r}")
        return float(value)
    if kind == "floats":
        if not isinstance(value, list) or any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in value):
            fail(f"expected a list of numbers, got {value!r}")
        if any(not math.isfinite(v) for v in value):
            fail("expected finite numbers")
        return [float(v) for v in value]
    if kind == "float_or_none":
        if value == "none":
            return None
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0 or not math.isfinite(value):
            fail(f"expected a positive number or \"none\", got {value!r}")
        return float(value)
    if kind == "ims":
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            fail(f"expected a list of IM names, got {value!r}")
        out = []
        for v in value:
            try:
                out.append(parse_im(v))
            except ValueError as exc:
                fail(str(exc))
        return out
    if kind in ("source_branches", "gmm_branches"):
        return _branches(kind, value, fail, base)
    if kind == "alternatives":  # entries are checked with their lines by _alternatives
        if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
            fail("expected [[scenario.alternatives]] tables")
        return value
    if kind == "path":
        if not isinstance(value, str) or not value.strip():
            fail(f"expected a file path string, got {value!r}")
        if "\x00" in value:
            fail("path contains a NUL byte")
        p = Path(value)
        return (p if p.is_absolute() else base / p).resolve()
    raise AssertionError(kind)


def _branches(kind, value, fail, base):
    """Logic-tree branches: a list of tables with a weight each; weights sum to 1."""
    fields = ("file", "weight", "id") if kind == "source_branches" else ("model", "weight")
    if not isinstance(value, list) or not value or not all(isinstance(v, dict) for v in value):
        fail(f"expected a list of tables like {{ {fields[0]} = ..., weight = ... }}")
    out = []
    for i, entry in enumerate(value):
        for key in entry:
            if key not in fields:
                fail(f"branch {i + 1}: unknown key '{key}'{_suggest(key, fields)}")
        weight = entry.get("weight")
        if isinstance(weight, bool) or not isinstance(weight, (int, float)) or not 0 < weight <= 1:
            fail(f"branch {i + 1}: weight must be a number in (0, 1], got {weight!r}")
        if kind == "source_branches":
            file = entry.get("file")
            if not isinstance(file, str) or not file.strip():
                fail(f"branch {i + 1}: 'file' must be a path string")
            p = Path(file)
            p = (p if p.is_absolute() else base / p).resolve()
            bid = entry.get("id", p.stem)
            if not isinstance(bid, str) or not bid:
                fail(f"branch {i + 1}: 'id' must be a non-empty string")
            out.append({"file": p, "weight": float(weight), "id": bid})
        else:
            from quakefolio.core.gmm import GMM_REGISTRY

            model = entry.get("model")
            if model not in GMM_REGISTRY:
                fail(f"branch {i + 1}: unknown ground-motion model {model!r}; valid: {', '.join(GMM_REGISTRY)}")
            out.append({"model": model, "weight": float(weight), "id": model})
    total = sum(b["weight"] for b in out)
    if abs(total - 1.0) > 1e-6:
        fail(f"branch weights must sum to 1, got {total:.6g}")
    ids = [b["id"] for b in out]
    if len(set(ids)) != len(ids):
        fail(f"branch ids must be unique, got {ids}")
    return out


#: Keys of one ``[[scenario.alternatives]]`` table (retrofit what-if).
ALTERNATIVE_KEYS = ("id", "description", "assets", "building_class", "new_class", "fragility_library",
                    "retrofit_cost", "retrofit_cost_ratio")
_ALTERNATIVE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$")


def _alternatives(entries, path, text, base):
    """Validate the ``[[scenario.alternatives]]`` tables; every error names its line and key.

    Only the file-local checks live here (types, required keys, one cost form); asset
    ids and class codes are checked against the exposure and the fragility libraries by
    :func:`quakefolio.pipeline.whatif.validate`.
    """
    table = ("scenario", "alternatives")
    out, ids = [], set()
    for i, entry in enumerate(entries):
        col = f"scenario.alternatives[{i}]"

        def fail(msg, key=None):
            raise InputError(path, msg, row=locate_toml_line(text, table, key, i),
                             column=f"{col}.{key}" if key else col)

        for key in entry:
            if key not in ALTERNATIVE_KEYS:
                fail(f"unknown key{_suggest(key, ALTERNATIVE_KEYS)}", key)
        for key in ("id", "new_class"):
            if key not in entry:
                fail(f"missing required key '{key}'", key)
            if not isinstance(entry[key], str) or not entry[key].strip():
                fail(f"expected a non-empty string, got {entry[key]!r}", key)
        aid = entry["id"]
        if not _ALTERNATIVE_ID.match(aid):
            fail(f"id {aid!r} must be 1-64 letters, digits, '-', '_' or '.'", "id")
        if aid in ids:
            fail(f"duplicate alternative id {aid!r}", "id")
        ids.add(aid)
        description = entry.get("description", "")
        if not isinstance(description, str):
            fail(f"expected a string, got {description!r}", "description")
        assets = entry.get("assets", [])
        if not isinstance(assets, list) or not all(isinstance(a, str) and a.strip() for a in assets):
            fail(f"expected a list of asset ids (strings), got {assets!r}", "assets")
        if "assets" in entry and not assets:
            fail("expected at least one asset id", "assets")
        twice = sorted({a for a in assets if assets.count(a) > 1})
        if twice:
            fail(f"asset id {twice[0]!r} listed more than once", "assets")
        selected_class = entry.get("building_class")
        if selected_class is not None and (not isinstance(selected_class, str) or not selected_class.strip()):
            fail(f"expected a building class code, got {selected_class!r}", "building_class")
        if not assets and selected_class is None:
            fail("select assets with 'assets' (a list of asset ids) and/or 'building_class'")
        library = entry.get("fragility_library")
        if library is not None:
            if not isinstance(library, str) or not library.strip() or "\x00" in library:
                fail(f"expected a file path string, got {library!r}", "fragility_library")
            p = Path(library)
            library = (p if p.is_absolute() else base / p).resolve()
        costs = [k for k in ("retrofit_cost", "retrofit_cost_ratio") if k in entry]
        if len(costs) != 1:
            fail("give exactly one of 'retrofit_cost' (per asset) and 'retrofit_cost_ratio' (of replacement "
                 f"value), got {len(costs)}", costs[1] if len(costs) == 2 else None)
        cost = entry[costs[0]]
        if isinstance(cost, bool) or not isinstance(cost, (int, float)) or not math.isfinite(cost) or cost <= 0:
            fail(f"expected a positive number, got {cost!r}", costs[0])
        out.append({"id": aid, "description": description, "assets": list(assets), "building_class": selected_class,
                    "new_class": entry["new_class"], "fragility_library": library,
                    "retrofit_cost": float(cost) if costs[0] == "retrofit_cost" else None,
                    "retrofit_cost_ratio": float(cost) if costs[0] == "retrofit_cost_ratio" else None})
    return out


def load_config(path):
    """Read, validate and resolve a run config file.

    Raises
    ------
    InputError
        On any problem, naming file, line and key.
    """
    path = Path(path).resolve() if Path(path).exists() else Path(path)
    text, data, digest = read_toml(path)
    base = path.parent
    sections = {}
    for sec, body in data.items():
        if sec not in SCHEMA:
            raise InputError(path, f"unknown section [{sec}]{_suggest(sec, SCHEMA)}",
                             row=locate_toml_line(text, (sec,)), column=sec)
        if not isinstance(body, dict):
            raise InputError(path, f"[{sec}] must be a table", row=locate_toml_line(text, (), sec), column=sec)
        for key in body:
            if key not in SCHEMA[sec]:
                raise InputError(path, f"unknown key{_suggest(key, SCHEMA[sec])}",
                                 row=locate_toml_line(text, (sec,), key), column=f"{sec}.{key}")
    for sec, keys in SCHEMA.items():
        body = data.get(sec, {})
        out = {}
        for key, spec in keys.items():
            row = locate_toml_line(text, (sec,), key)
            column = f"{sec}.{key}"
            if key in body:
                value = _coerce(spec, body[key], path, row, column, base)
                if spec.check is not None:
                    msg = spec.check(value)
                    if msg:
                        raise InputError(path, f"{msg}, got {body[key]!r}", row=row, column=column)
            elif spec.default is _Key.REQUIRED:
                raise InputError(path, f"missing required key '{key}' in [{sec}]",
                                 row=locate_toml_line(text, (sec,)), column=column)
            else:
                value = spec.default
                if spec.kind == "path" and value is not None:
                    value = (base / value).resolve()
            out[key] = value
        sections[sec] = out
    sections["scenario"]["alternatives"] = _alternatives(sections["scenario"]["alternatives"], path, text, base)
    hz = sections["hazard"]
    if hz["mode"] == "ingest" and hz["curves_file"] is None:
        raise InputError(path, "mode = \"ingest\" needs curves_file", row=locate_toml_line(text, ("hazard",), "mode"),
                         column="hazard.curves_file")
    out = sections["output"]["folder"]
    if out.exists() and not out.is_dir():
        raise InputError(path, f"output folder {str(out)!r} is an existing file; name a folder",
                         row=locate_toml_line(text, ("output",), "folder"), column="output.folder")
    pf = sections["portfolio"]
    if pf["event_based"] is None:
        pf["event_based"] = hz["mode"] == "compute"
    elif pf["event_based"] and hz["mode"] != "compute":
        raise InputError(path, "event_based = true needs [hazard] mode = \"compute\" (events come from the "
                               "source model)", row=locate_toml_line(text, ("portfolio",), "event_based"),
                         column="portfolio.event_based")
    if hz["mode"] == "compute":
        for key in ("source_models", "gmm_branches"):
            if hz[key] is None:
                raise InputError(path, f"mode = \"compute\" needs {key}", row=locate_toml_line(text, ("hazard",), "mode"),
                                 column=f"hazard.{key}")
    return Config(path=path, sections=sections, sha256=digest, raw=data)


def sha256_file(path, chunk=1 << 20):
    """sha256 hex digest of a file's bytes."""
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
    """
    ex = config["execution"]
    backend = executor or ("dask" if address else ex["backend"])
    if backend != "dask":
        return "local", ""
    return "dask", address if address is not None else ex["address"]
