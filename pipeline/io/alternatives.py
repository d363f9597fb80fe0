"""Retrofit alternatives of the run configuration (``[[scenario.alternatives]]``) and path keys.

The file-local checks of each alternative (types, required keys, one cost form, its id);
asset ids and class codes are checked against the exposure and the fragility libraries by
:func:`quakefolio.pipeline.stages.whatif.validate`.  Also the path rule shared with
:mod:`quakefolio.pipeline.io.config`: file names resolved against the config's folder.
"""
from __future__ import annotations

from pathlib import Path

from quakefolio.core.validation import (
    Field, Interval, ListOf, Pattern, Real, Rule, Schema, Text, check_value, toml_place, validate_table,
)

__all__ = ["ALTERNATIVE_KEYS", "parse_alternatives"]

_POSITIVE = Interval(0, None, closed="neither")


def _resolve(value, base):
    p = Path(value)
    return (p if p.is_absolute() else base / p).resolve()


class _ResolvedPath(Rule):
    """A path without NUL bytes, resolved against the config file's folder (``context["base"]``)."""

    def __init__(self, message="path contains a NUL byte", test=lambda v: "\x00" not in v, show_value=False):
        super().__init__(test, message, show_value=show_value)

    def convert(self, value, context):
        return _resolve(value, context["base"])


ALTERNATIVE_KEYS = ("id", "description", "assets", "building_class", "new_class", "fragility_library",
                    "retrofit_cost", "retrofit_cost_ratio")
_ALTERNATIVE_ID = Pattern(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$")
_NAME = (Text(non_empty=True),)
_OPTIONAL = Field((), None)
#: Presence and type of the two names every alternative needs; the other keys are checked by
#: :data:`_ALTERNATIVE_VALUES` once the id is known to be new.
_ALTERNATIVE_SCHEMA = Schema({k: Field(_NAME) if k in ("id", "new_class") else _OPTIONAL for k in ALTERNATIVE_KEYS},
                             cutoff=0.5, valid_label="valid")
def _listed_twice(assets):
    return f"asset id {sorted({a for a in assets if assets.count(a) > 1})[0]!r} listed more than once"


#: Key -> (default, rules) of the optional keys of an alternative, in checking order.
_ALTERNATIVE_VALUES = {
    "description": ("", (Text(),)),
    "assets": ([], (ListOf(Text(non_empty=True), "expected a list of asset ids (strings)"),
                    ListOf(message="expected at least one asset id", min_len=1, show_value=False),
                    Rule(lambda a: len(set(a)) == len(a), _listed_twice, show_value=False))),
    "building_class": (None, (Text("expected a building class code", non_empty=True),)),
}
_LIBRARY_PATH = (_ResolvedPath("expected a file path string",
                               lambda v: isinstance(v, str) and bool(v.strip()) and "\x00" not in v, True),)
_COSTS = ("retrofit_cost", "retrofit_cost_ratio")
_POSITIVE_COST = (Real(finite=True, message="expected a positive number"), _POSITIVE)


def _alternative_values(entry, place, base):
    """The optional values of one alternative after their declared checks (defaults filled in)."""
    out = {}
    for key, (default, rules) in _ALTERNATIVE_VALUES.items():
        if key not in entry:
            out[key] = default
            continue
        out[key], msg = check_value(rules, entry[key])
        if msg is not None:
            raise place.error(msg, key)
    if not out["assets"] and out["building_class"] is None:
        raise place.error("select assets with 'assets' (a list of asset ids) and/or 'building_class'")
    if "fragility_library" in entry:
        out["fragility_library"], msg = check_value(_LIBRARY_PATH, entry["fragility_library"], {"base": base})
        if msg is not None:
            raise place.error(msg, "fragility_library")
    else:
        out["fragility_library"] = None
    return out


def _alternative_cost(entry, place):
    """``(retrofit_cost, retrofit_cost_ratio)`` of one alternative: exactly one is given, positive."""
    costs = [k for k in _COSTS if k in entry]
    if len(costs) != 1:
        raise place.error("give exactly one of 'retrofit_cost' (per asset) and 'retrofit_cost_ratio' (of "
                          f"replacement value), got {len(costs)}", costs[1] if len(costs) == 2 else None)
    cost, msg = check_value(_POSITIVE_COST, entry[costs[0]])
    if msg is not None:
        raise place.error(msg, costs[0])
    return (cost, None) if costs[0] == "retrofit_cost" else (None, cost)


def parse_alternatives(entries, path, text, base):
    """Validate the ``[[scenario.alternatives]]`` tables; every error names its line and key.

    Only the file-local checks live here (types, required keys, one cost form); asset
    ids and class codes are checked against the exposure and the fragility libraries by
    :func:`quakefolio.pipeline.stages.whatif.validate`.

    Parameters
    ----------
    entries : list of dict
        The parsed tables.
    path : Path
        The config file.
    text : str
        Its TOML text (to locate lines).
    base : Path
        Folder relative file names are resolved against.

    Returns
    -------
    list of dict
        One dict per alternative with every key of :data:`ALTERNATIVE_KEYS` (costs as
        float or None, ``fragility_library`` as a resolved path or None).
    """
    out, ids = [], set()
    for i, entry in enumerate(entries):
        place = toml_place(path, text, ("scenario", "alternatives"), f"scenario.alternatives[{i}]", i)
        validate_table(entry, _ALTERNATIVE_SCHEMA, place)
        aid = entry["id"]
        if not _ALTERNATIVE_ID.holds(aid):
            raise place.error(f"id {aid!r} must be 1-64 letters, digits, '-', '_' or '.'", "id")
        if aid in ids:
            raise place.error(f"duplicate alternative id {aid!r}", "id")
        ids.add(aid)
        values = _alternative_values(entry, place, base)
        cost, ratio = _alternative_cost(entry, place)
        out.append({"id": aid, "description": values["description"], "assets": list(values["assets"]),
                    "building_class": values["building_class"], "new_class": entry["new_class"],
                    "fragility_library": values["fragility_library"], "retrofit_cost": cost,
                    "retrofit_cost_ratio": ratio})
    return out
