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
    casualty_rate = 0.0            # optional, fraction of occupants

Every problem is raised as :class:`quakefolio.core.errors.InputError` naming the file,
the line and the key.  The file is data only: parsed with :mod:`tomllib`, never executed.
"""
from __future__ import annotations

import difflib
import hashlib
import math
import re
import tomllib
from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.loss import check_damage_ratios
from quakefolio.fragility.models import DamageStateSet, FragilityLibrary

__all__ = ["load_library", "parse_library", "FORMAT_TAG"]

FORMAT_TAG = "quakefolio-fragility-1"
_CLASS_KEYS = ("description", "im", "collapse_state", "states")
_STATE_KEYS = ("name", "median", "beta", "mean_damage_ratio", "cov", "downtime_days", "casualty_rate")
_REQUIRED_STATE_KEYS = ("name", "median", "beta", "mean_damage_ratio")
_CODE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,31}$")
_TOML_POS = re.compile(r"\(at line (\d+), column (\d+)\)")


def _suggest(key, valid):
    close = difflib.get_close_matches(key, valid, n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else f"; valid keys: {', '.join(valid)}"


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


def _number(value, path, row, column, *, positive=False, unit_interval=False):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise InputError(path, f"expected a number, got {value!r}", row=row, column=column)
    v = float(value)
    if not math.isfinite(v):
        raise InputError(path, f"expected a finite number, got {value!r}", row=row, column=column)
    if positive and v <= 0:
        raise InputError(path, f"expected a positive number, got {value!r}", row=row, column=column)
    if unit_interval and not 0 <= v <= 1:
        raise InputError(path, f"expected a number in [0, 1], got {value!r}", row=row, column=column)
    return v


def parse_library(data, *, text="", path="<fragility library>"):
    """Validate a parsed library mapping and build the damage-state sets."""
    def line(table, key=None, occurrence=0):
        return locate_toml_line(text, table, key, occurrence) if text else None

    for key in data:
        if key not in ("format", "classes"):
            raise InputError(path, f"unknown key{_suggest(key, ['format', 'classes'])}", row=line((), key), column=key)
    fmt = data.get("format")
    if fmt != FORMAT_TAG:
        raise InputError(path, f"expected format = \"{FORMAT_TAG}\", got {fmt!r}", row=line((), "format"),
                         column="format")
    classes = data.get("classes")
    if not isinstance(classes, dict) or not classes:
        raise InputError(path, "no building classes defined (expected [classes.<code>] tables)", column="classes")
    out = {}
    for code, body in classes.items():
        tbl = ("classes", code)
        if not _CODE.match(code):
            raise InputError(path, f"class code {code!r} must be 1-32 letters, digits, '-', '_' or '.'",
                             row=line(tbl), column=f"classes.{code}")
        if not isinstance(body, dict):
            raise InputError(path, "expected a table", row=line(tbl), column=f"classes.{code}")
        for key in body:
            if key not in _CLASS_KEYS:
                raise InputError(path, f"unknown key{_suggest(key, _CLASS_KEYS)}", row=line(tbl, key),
                                 column=f"classes.{code}.{key}")
        if "im" not in body:
            raise InputError(path, "missing required key 'im'", row=line(tbl), column=f"classes.{code}.im")
        states = body.get("states")
        if not isinstance(states, list) or not states:
            raise InputError(path, "needs at least one [[classes.<code>.states]] entry", row=line(tbl),
                             column=f"classes.{code}.states")
        rows = {k: [] for k in _STATE_KEYS}
        for i, st in enumerate(states):
            stbl = ("classes", code, "states")
            col = f"classes.{code}.states[{i}]"
            if not isinstance(st, dict):
                raise InputError(path, "expected a table", row=line(stbl, None, i), column=col)
            for key in st:
                if key not in _STATE_KEYS:
                    raise InputError(path, f"unknown key{_suggest(key, _STATE_KEYS)}", row=line(stbl, key, i),
                                     column=f"{col}.{key}")
            for key in _REQUIRED_STATE_KEYS:
                if key not in st:
                    raise InputError(path, f"missing required key '{key}'", row=line(stbl, None, i),
                                     column=f"{col}.{key}")
            name = st["name"]
            if not isinstance(name, str) or not name.strip():
                raise InputError(path, f"expected a non-empty name, got {name!r}", row=line(stbl, "name", i),
                                 column=f"{col}.name")
            rows["name"].append(name)
            rows["median"].append(_number(st["median"], path, line(stbl, "median", i), f"{col}.median",
                                          positive=True))
            rows["beta"].append(_number(st["beta"], path, line(stbl, "beta", i), f"{col}.beta", positive=True))
            rows["mean_damage_ratio"].append(
                _number(st["mean_damage_ratio"], path, line(stbl, "mean_damage_ratio", i),
                        f"{col}.mean_damage_ratio", unit_interval=True))
            for key, kw in (("cov", {}), ("downtime_days", {}), ("casualty_rate", {"unit_interval": True})):
                if key in st:
                    v = _number(st[key], path, line(stbl, key, i), f"{col}.{key}", **kw)
                    if v < 0:
                        raise InputError(path, f"expected a non-negative number, got {st[key]!r}",
                                         row=line(stbl, key, i), column=f"{col}.{key}")
                    rows[key].append(v)
                else:
                    rows[key].append(0.0 if key == "cov" else math.nan)
            try:  # the loss-ratio distribution of this state must exist; locate the problem at its cov
                check_damage_ratios(rows["mean_damage_ratio"][i:], rows["cov"][i:])
            except ValueError as exc:
                raise InputError(path, str(exc), row=line(stbl, "cov" if "cov" in st else None, i),
                                 column=f"{col}.cov") from None
            if i > 0:
                checks = (("median", "medians must increase with severity"),
                          ("mean_damage_ratio", "mean damage ratios must not decrease with severity"))
                for key, what in checks:
                    prev, cur = rows[key][i - 1], rows[key][i]
                    bad = cur <= prev if key == "median" else cur < prev
                    if bad:
                        raise InputError(
                            path, f"damage states out of order: {what} ({prev:g} for '{rows['name'][i - 1]}', "
                                  f"then {cur:g} for '{name}')",
                            row=line(stbl, key, i), column=f"{col}.{key}")
        collapse = body.get("collapse_state", rows["name"][-1])
        if collapse not in rows["name"]:
            raise InputError(path, f"collapse_state {collapse!r} is not one of the states {rows['name']}",
                             row=line(tbl, "collapse_state"), column=f"classes.{code}.collapse_state")
        try:
            dss = DamageStateSet(
                class_code=code,
                im=body["im"],
                names=tuple(rows["name"]),
                medians=np.array(rows["median"]),
                betas=np.array(rows["beta"]),
                mean_damage_ratio=np.array(rows["mean_damage_ratio"]),
                cov=np.array(rows["cov"]),
                downtime_days=np.array(rows["downtime_days"]),
                casualty_rate=np.array(rows["casualty_rate"]),
                collapse_index=rows["name"].index(collapse),
                description=str(body.get("description", "")),
            )
        except ValueError as exc:
            key = "im" if "IM" in str(exc) else None
            raise InputError(path, str(exc), row=line(tbl, key), column=f"classes.{code}" + (".im" if key else "")) \
                from None
        out[code] = dss
    return FragilityLibrary(classes=out, path=path)
