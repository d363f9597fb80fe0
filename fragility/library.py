"""Fragility-library files (TOML, our own layout) to :class:`FragilityLibrary`.

Layout::

    format = "quakefolio-fragility-1"

    [classes.RCF-LO]
    description = "..."            # optional
    im = "SA_0.3"
    collapse_state = "collapse"    # optional, default: the last state

    [[classes.RCF-LO.states]]
    name = "cosmetic"
    median = 0.22                  # IM units (g)
    beta = 0.60
    mean_damage_ratio = 0.02       # repair cost / replacement value
    cov = 0.8                      # optional, CoV of the loss ratio
    downtime_days = 3              # optional
    casualty_rate = 0.0            # optional, fraction of occupants present
    contents_damage_ratio = 0.05   # optional, contents loss / contents value

A class may instead give a vulnerability table (no damage states; interpolation and
distribution in :mod:`quakefolio.core.vulnerability`)::

    [classes.WD-VF]
    im = "SA_0.3"

    [[classes.WD-VF.vulnerability]]
    im_level = 0.1                 # IM units (g), increasing from row to row
    mean_loss_ratio = 0.01         # in [0, 1], non-decreasing
    cov = 1.0                      # optional, CoV of the loss ratio at this level (default 0)

A class that gives ``downtime_days``, ``casualty_rate`` or ``contents_damage_ratio`` for
only some of its states has no figure for that consequence (its assets are left out of the
totals and counted; contents or interruption values in the exposure are then an error).

Every problem is raised as :class:`quakefolio.core.errors.InputError` naming the file,
the line and the key; a median far from any real ground motion (bounds in
:mod:`quakefolio.core.plausibility`) is such a problem.  Doubtful but usable content (a
``collapse_state`` naming the least severe of several states) is kept as an
:class:`~quakefolio.core.errors.InputWarning` in the library's ``warnings``.  The file is
data only: parsed with :mod:`tomllib`, never executed.
"""
from __future__ import annotations

import hashlib
import math
import re
import tomllib
from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, InputWarning
from quakefolio.core.loss import check_damage_ratios
from quakefolio.core.plausibility import median_problem
from quakefolio.core.validation import Field, Interval, Pattern, Real, Schema, Text, toml_place, validate_table
from quakefolio.core.vulnerability import VulnerabilityTableError, check_vulnerability_row
from quakefolio.fragility.models import DamageStateSet, FragilityLibrary, VulnerabilityFunction

__all__ = ["load_library", "parse_library", "FORMAT_TAG"]

FORMAT_TAG = "quakefolio-fragility-1"
_CODE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,31}$")
_TOML_POS = re.compile(r"\(at line (\d+), column (\d+)\)")


def read_toml(path):
    """Parse a TOML file; syntax and encoding errors become InputError with the line."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise InputError(path, "file not found") from None
    except OSError as exc:
        raise InputError(path, f"cannot read file: {exc.strerror}") from None
    if not raw.strip():
        raise InputError(path, "file is empty")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(path, f"not valid UTF-8 text (byte 0x{raw[exc.start]:02x})", row=line) from None
    if text.startswith("\ufeff"):  # a byte-order mark, as some editors write: accepted as for CSV
        text = text[1:]
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        msg = str(exc)
        m = _TOML_POS.search(msg)
        row = int(m.group(1)) if m else None
        raise InputError(path, f"TOML syntax error: {_TOML_POS.sub('', msg).strip()}", row=row) from None
    return text, data, hashlib.sha256(raw).hexdigest()


def load_library(path):
    """Load and validate a fragility library file; returns :class:`FragilityLibrary`."""
    text, data, digest = read_toml(path)
    lib = parse_library(data, text=text, path=str(path))
    lib.sha256 = digest
    return lib


_NUMBER = (Real(), Real(finite=True))
_POSITIVE = _NUMBER + (Interval(0, None, closed="neither"),)
_NON_NEGATIVE = Interval(0, None)
_TOP_SCHEMA = Schema({"format": Field((), None), "classes": Field((), None)})
_CLASS_SCHEMA = Schema({"description": Field((), ""), "im": Field(()), "collapse_state": Field((), None),
                        "states": Field((), None), "vulnerability": Field((), None)})
#: One ``[[classes.<code>.vulnerability]]`` row of a vulnerability table.
_VULNERABILITY_SCHEMA = Schema({
    "im_level": Field(_POSITIVE, help="intensity level [IM units, g]"),
    "mean_loss_ratio": Field(_NUMBER + (Interval(0, 1),), help="mean repair cost / replacement value [-]"),
    "cov": Field(_NUMBER + (_NON_NEGATIVE,), 0.0, help="coefficient of variation of the loss ratio [-]"),
}, missing_first=True)
#: One ``[[classes.<code>.states]]`` table: every key with its constraints and default.
_STATE_SCHEMA = Schema({
    "name": Field((Text("expected a non-empty name", non_empty=True),), help="damage-state name"),
    "median": Field(_POSITIVE, help="median IM of the fragility [IM units, g]"),
    "beta": Field(_POSITIVE, help="lognormal dispersion [-]"),
    "mean_damage_ratio": Field(_NUMBER + (Interval(0, 1),), help="repair cost / replacement value [-]"),
    "cov": Field(_NUMBER + (_NON_NEGATIVE,), 0.0, help="coefficient of variation of the loss ratio [-]"),
    "downtime_days": Field(_NUMBER + (_NON_NEGATIVE,), math.nan, help="downtime [days]"),
    "casualty_rate": Field(_NUMBER + (Interval(0, 1), _NON_NEGATIVE), math.nan,
                           help="casualties as a fraction of occupants [-]"),
    "contents_damage_ratio": Field(_NUMBER + (Interval(0, 1),), math.nan,
                                   help="contents loss / contents value [-]"),
}, missing_first=True)
_CLASS_CODE = Pattern(_CODE.pattern, lambda code: f"class code {code!r} must be 1-32 letters, digits, '-', '_' or '.'",
                      show_value=False)
_ORDER = (("median", "medians must increase with severity", lambda prev, cur: cur <= prev),
          ("mean_damage_ratio", "mean damage ratios must not decrease with severity", lambda prev, cur: cur < prev),
          ("contents_damage_ratio", "contents damage ratios must not decrease with severity",
           lambda prev, cur: cur < prev))



def _check_top(data, text, path):
    """Top-level keys, the format tag and the presence of classes; returns the classes table."""
    place = toml_place(path, text, (), "")
    validate_table(data, _TOP_SCHEMA, place)
    fmt = data.get("format")
    if fmt != FORMAT_TAG:
        raise place.error(f"expected format = \"{FORMAT_TAG}\", got {fmt!r}", "format")
    classes = data.get("classes")
    if not isinstance(classes, dict) or not classes:
        raise InputError(path, "no building classes defined (expected [classes.<code>] tables)", column="classes")
    return classes


def _check_state_order(rows, i, place):
    """Medians increase and mean damage ratios do not decrease from state ``i - 1`` to ``i``."""
    for key, what, bad in _ORDER:
        prev, cur = rows[key][i - 1], rows[key][i]
        if bad(prev, cur):
            raise place.error(f"damage states out of order: {what} ({prev:g} for '{rows['name'][i - 1]}', "
                              f"then {cur:g} for '{rows['name'][i]}')", key)


def _state_rows(code, states, text, path):
    """The damage states of one class as columns (key -> list), checked state by state."""
    rows = {k: [] for k in _STATE_SCHEMA.fields}
    for i, st in enumerate(states):
        place = toml_place(path, text, ("classes", code, "states"), f"classes.{code}.states[{i}]", i)
        if not isinstance(st, dict):
            raise place.error("expected a table")
        values = validate_table(st, _STATE_SCHEMA, place)
        problem = median_problem(values["median"])
        if problem is not None:
            raise place.error(f"{problem}", "median")
        for key, value in values.items():
            rows[key].append(value)
        try:  # the loss-ratio distribution of this state must exist; locate the problem at its cov
            check_damage_ratios(rows["mean_damage_ratio"][i:], rows["cov"][i:])
        except ValueError as exc:
            raise place.error(str(exc), "cov", row_key="cov" if "cov" in st else None) from None
        if i > 0:
            _check_state_order(rows, i, place)
    return rows


def _collapse_warning(code, rows, collapse, place):
    """A warning when ``collapse_state`` names the least severe of several states, else None."""
    if collapse != rows["name"][0] or len(rows["name"]) < 2:
        return None
    return InputWarning(place.path, f"collapse_state {collapse!r} is the least severe of {len(rows['name'])} damage "
                                    "states: every building reaching it counts as collapsed in the collapse-risk "
                                    "screening; name the most severe state meant by collapse",
                        row=place.locate("collapse_state"), column=place.column_of("collapse_state"))


#: A first row's mean loss ratio above this is doubtful: the loss ratio is 0 below the first level.
FIRST_MEAN_WARN_ABOVE = 0.1


def _vulnerability(code, body, text, path, place, warnings):
    """A ``[[classes.<code>.vulnerability]]`` table to its :class:`VulnerabilityFunction`, row by row
    (a doubt is appended to ``warnings``)."""
    if body.get("collapse_state") is not None:
        raise place.error("a class given by a vulnerability table has no damage states: collapse_state has no "
                          "meaning here", "collapse_state")
    rows = body["vulnerability"]
    if not isinstance(rows, list) or len(rows) < 2 or not all(isinstance(r, dict) for r in rows):
        raise place.error("a vulnerability table needs at least 2 [[classes.<code>.vulnerability]] rows",
                          "vulnerability")
    columns = {k: [] for k in _VULNERABILITY_SCHEMA.fields}
    for i, row in enumerate(rows):
        here = toml_place(path, text, ("classes", code, "vulnerability"), f"classes.{code}.vulnerability[{i}]", i)
        values = validate_table(row, _VULNERABILITY_SCHEMA, here)
        problem = median_problem(values["im_level"])
        if problem is not None:
            raise here.error(problem.replace("median", "im_level").replace("medians", "im levels"), "im_level")
        for key, value in values.items():
            columns[key].append(value)
        try:
            check_vulnerability_row(*(np.array(columns[k], dtype=float) for k in columns), i)
        except VulnerabilityTableError as exc:
            raise here.error(str(exc), exc.key, row_key=exc.key if exc.key in row else None) from None
    first = columns["mean_loss_ratio"][0]
    if first > FIRST_MEAN_WARN_ABOVE:  # the function jumps from 0 to ``first`` at the first level
        here = toml_place(path, text, ("classes", code, "vulnerability"), f"classes.{code}.vulnerability[0]", 0)
        warnings.append(InputWarning(path, f"the first row's mean_loss_ratio {first:g} is above "
                                           f"{FIRST_MEAN_WARN_ABOVE:g}: the loss ratio is 0 below the first im_level "
                                           f"({columns['im_level'][0]:g} g) and jumps there; start the table where "
                                           "loss begins", row=here.locate("mean_loss_ratio"),
                                     column=here.column_of("mean_loss_ratio")))
    return VulnerabilityFunction(class_code=code, im=body["im"], levels=np.array(columns["im_level"]),
                                 mean_loss_ratio=np.array(columns["mean_loss_ratio"]), cov=np.array(columns["cov"]),
                                 description=str(body.get("description", "")))


def _parse_class(code, body, text, path, warnings):
    """One ``[classes.<code>]`` table to its :class:`DamageStateSet` or :class:`VulnerabilityFunction`
    (a doubt is appended to ``warnings``)."""
    place = toml_place(path, text, ("classes", code), f"classes.{code}")
    if not _CLASS_CODE.holds(code):
        raise place.error(_CLASS_CODE.failure(code, code))
    if not isinstance(body, dict):
        raise place.error("expected a table")
    validate_table(body, _CLASS_SCHEMA, place)
    states = body.get("states")
    if "vulnerability" in body:
        if states is not None:
            raise place.error("give either damage states or a vulnerability table, not both", "vulnerability")
        try:
            return _vulnerability(code, body, text, path, place, warnings)
        except ValueError as exc:  # the IM name
            if isinstance(exc, InputError):
                raise
            raise place.error(str(exc), "im") from None
    if not isinstance(states, list) or not states:
        raise place.error("needs at least one [[classes.<code>.states]] entry, or a vulnerability table "
                          "([[classes.<code>.vulnerability]] rows)", None, column=f"classes.{code}.states")
    rows = _state_rows(code, states, text, path)
    collapse = body.get("collapse_state", rows["name"][-1])
    if collapse not in rows["name"]:
        raise place.error(f"collapse_state {collapse!r} is not one of the states {rows['name']}", "collapse_state")
    doubt = _collapse_warning(code, rows, collapse, place)
    if doubt is not None:
        warnings.append(doubt)
    try:
        return DamageStateSet(
            class_code=code,
            im=body["im"],
            names=tuple(rows["name"]),
            medians=np.array(rows["median"]),
            betas=np.array(rows["beta"]),
            mean_damage_ratio=np.array(rows["mean_damage_ratio"]),
            cov=np.array(rows["cov"]),
            downtime_days=np.array(rows["downtime_days"]),
            casualty_rate=np.array(rows["casualty_rate"]),
            contents_damage_ratio=np.array(rows["contents_damage_ratio"]),
            collapse_index=rows["name"].index(collapse),
            description=str(body.get("description", "")),
        )
    except ValueError as exc:
        key = "im" if "IM" in str(exc) else None
        raise place.error(str(exc), key) from None


def parse_library(data, *, text="", path="<fragility library>"):
    """Validate a parsed library mapping and build the damage-state sets.

    Parameters
    ----------
    data : dict
        The parsed TOML document.
    text : str
        Its text, to name lines in errors ("" when unknown: no lines are named).
    path : str
        The file named in errors.

    Returns
    -------
    FragilityLibrary
        One :class:`DamageStateSet` per class code; ``warnings`` holds the doubts found.

    Raises
    ------
    InputError
        On the first problem, naming file, line and key.
    """
    classes = _check_top(data, text, path)
    warnings = []
    out = {code: _parse_class(code, body, text, path, warnings) for code, body in classes.items()}
    return FragilityLibrary(classes=out, path=path, warnings=tuple(warnings))
