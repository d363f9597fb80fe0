"""Source-model files (TOML, our own layout) to a :class:`~quakefolio.core.sources.ruptures.RuptureSet`.

Layout::

    format = "quakefolio-sources-1"
    name = "..."                         # optional

    [settings]                           # optional, defaults shown
    shear_modulus_pa = 3.0e10            # for slip-rate moment balance
    moment_constant = 9.05               # log10 M0 [N m] = 1.5 Mw + c (Hanks & Kanamori 1979)
    rupture_step_km = 2.0                # floating step of fault ruptures
    min_aspect_ratio = 1.0               # rupture length / width lower bound

    [[faults]]
    id = "north_fault"
    trace = [[lon, lat], [lon, lat]]     # two points: planar; more: bent (one plane per segment),
                                         # dipping to the right of each segment, ruptures floating
                                         # along the whole trace
    dip_deg = 60.0
    rake_deg = 90.0
    upper_depth_km = 0.0
    lower_depth_km = 15.0
    mfd = { kind = "truncated_gr", b_value = 1.0, min_mag = 5.0, max_mag = 7.0, bin_width = 0.1,
            rate_above_min = 0.02 }      # or a_value = ..., or slip_rate_mm_per_yr = ...

    [[areas]]                            # every kind takes an optional tectonic region:
    region = "active_crustal"            # (default) or "subduction_interface", "subduction_intraslab",
                                         # "stable_continental"; the subduction event type follows from it
    id = "zone_a"
    polygon = [[lon, lat], ...]
    spacing_km = 10.0
    upper_depth_km = 0.0
    lower_depth_km = 20.0
    hypo_depths = [[8.0, 0.5], [12.0, 0.5]]              # (depth km, weight)
    mechanisms = [[0.0, 90.0, 0.0, 1.0]]                 # (strike, dip, rake deg, weight)
    mfd = { kind = "truncated_gr", ... }

    [[points]]                           # as areas, with lon and lat instead of polygon
    id = "p"
    ...
    mechanisms = [[90.0, 0.0, 1.0]]      # (dip, rake deg, weight): no strike, with one of
    strikes = [[0.0, 0.5], [90.0, 0.5]]  # (strike deg, weight): rates split by both weights
    uniform_strikes = 12                 # or: 12 strikes 30 deg apart, equal weights

A fault's rupture longer than the fault (Wells & Coppersmith 1994 dimensions, width limited to
the fault's) is capped at the fault length and keeps its rate; one warning per fault names those
magnitudes, and the source's summary lists them (``mags_capped``) and those whose scaling area
alone exceeds the fault area (``mags_area_above_fault``, beside the moment balance).

MFD kinds: ``truncated_gr`` (b_value, min_mag, max_mag, bin_width, one of
rate_above_min / a_value / slip_rate_mm_per_yr), ``characteristic`` (b_value, min_mag,
char_mag, bin_width, one of total_rate / slip_rate_mm_per_yr), ``single`` (mag, one of
rate / slip_rate_mm_per_yr).  Slip rates are moment-balanced on faults only.
"""
from __future__ import annotations

import math

from typing import NamedTuple

from quakefolio.core.errors import InputWarning, did_you_mean
from quakefolio.core.gmm import TECTONIC_REGIONS
from quakefolio.core.plausibility import MAX_MAGNITUDE
from quakefolio.core.sources.counts import (
    fault_rupture_count, magnitude_bin_count, point_rupture_count, polygon_point_count,
)
from quakefolio.core.sources.mfd import (
    characteristic_yc85, moment_balanced, moment_rate_from_slip, single_magnitude, truncated_gr,
)
from quakefolio.core.sources.faults import fault_ruptures, rupture_fit
from quakefolio.core.sources.geometry import polyline_self_crossing
from quakefolio.core.sources.ruptures import (
    RuptureSet, area_source_ruptures, fault_frame, fault_plane_area_km2, point_source_ruptures,
)
from quakefolio.core.sources.strikes import mechanisms_with_strikes, strike_distribution, uniform_strikes
from quakefolio.core.validation import Field, Interval, Real, Schema, check_value, toml_place, validate_table
from quakefolio.fragility.library import read_toml

__all__ = ["SourceModel", "load_source_model", "count_source_model", "FORMAT_TAG", "RuptureLimit", "MAX_FAULT_WIDTH_KM"]

FORMAT_TAG = "quakefolio-sources-1"
_TOP = ("format", "name", "settings", "faults", "areas", "points")
_SETTINGS = {"shear_modulus_pa": 3.0e10, "moment_constant": 9.05, "rupture_step_km": 2.0, "min_aspect_ratio": 1.0}
#: Widest fault plane accepted down dip [km]: ``(lower_depth_km - upper_depth_km) / sin(dip)``.
#: The widest subduction interfaces are a few hundred km down dip (from memory); a plane
#: wider than this is a typing error (a dip of 0.001 deg makes a 15 km layer 860,000 km wide).
MAX_FAULT_WIDTH_KM = 1000.0
_COMMON = ("id", "upper_depth_km", "lower_depth_km", "mfd")
_KEYS = {
    "faults": _COMMON + ("trace", "dip_deg", "rake_deg"),
    "areas": _COMMON + ("polygon", "spacing_km", "hypo_depths", "mechanisms"),
    "points": _COMMON + ("lon", "lat", "hypo_depths", "mechanisms"),
}
#: Optional keys of point and area sources: a strike distribution crossed with mechanisms given without strike.
_STRIKE_KEYS = ("strikes", "uniform_strikes")
_OPTIONAL = {"faults": ("region",), "areas": _STRIKE_KEYS + ("region",), "points": _STRIKE_KEYS + ("region",)}
_MFD_KEYS = {
    "truncated_gr": ("kind", "b_value", "min_mag", "max_mag", "bin_width", "rate_above_min", "a_value",
                     "slip_rate_mm_per_yr"),
    "characteristic": ("kind", "b_value", "min_mag", "char_mag", "bin_width", "total_rate", "slip_rate_mm_per_yr"),
    "single": ("kind", "mag", "rate", "slip_rate_mm_per_yr"),
}


class RuptureLimit(NamedTuple):
    """Most ruptures a source-model file may have, and why (the end of the refusal message)."""

    max_ruptures: int
    why: str


class _Tally:
    """Ruptures counted so far in one file, against the limit (None: no limit)."""

    def __init__(self, limit, build):
        self.limit, self.used, self.build = limit, 0, build  # build: False to count only

    def room(self):
        return None if self.limit is None else self.limit.max_ruptures - self.used

    def take(self, n, key, what, *, table=None):
        """Count ``n`` more ruptures; refuse (naming ``key``) when they exceed the limit."""
        room = self.room()
        if room is not None and n > room:
            before = f" besides the {self.used:,} of the sources above" if self.used else ""
            raise _FieldError(key, f"{what}{before}; {self.limit.why}", table=table)
        self.used += n


class SourceModel:
    """A parsed source model: its ruptures, per-source summary and provenance.

    ``magnitudes`` holds per source ``(row, column, smallest, largest magnitude [Mw], tectonic
    region)`` with the line and key of its ``mfd`` (for checks against the region's
    ground-motion models), and
    ``warnings`` the doubts found in the file (:class:`~quakefolio.core.errors.InputWarning`), and
    ``traces`` per fault ``(source id, tectonic region, ((lon, lat) [deg], ...))``: its trace as given,
    for maps.
    """

    def __init__(self, path, name, ruptures, sources, sha256, magnitudes=(), warnings=(), traces=()):
        self.path, self.name, self.ruptures, self.sources, self.sha256 = path, name, ruptures, sources, sha256
        self.magnitudes, self.warnings, self.traces = tuple(magnitudes), tuple(warnings), tuple(traces)


_TOP_SCHEMA = Schema({key: Field((), None) for key in _TOP})
_NUMBER = (Real(finite=True),)
_POSITIVE_NUMBER = _NUMBER + (Interval(0, None, closed="neither"),)
_NON_NEGATIVE_NUMBER = _NUMBER + (Interval(0, None),)
#: Kind -> schema of one source table: every key required, a missing one reported at the table.
_SOURCE_SCHEMAS = {kind: Schema({**{key: Field(()) for key in keys}, **{key: Field((), None) for key in _OPTIONAL[kind]}},
                          missing_names_key=False, missing_first=True)
                   for kind, keys in _KEYS.items()}


def _settings(data, path, text):
    """``[settings]`` with defaults, each value a positive finite number, checked in file order."""
    place = toml_place(path, text, ("settings",), "settings")
    settings = dict(_SETTINGS)
    for key, value in data.get("settings", {}).items():
        if key not in _SETTINGS:
            raise place.error(f"unknown key{_hint(key, _SETTINGS)}", key)
        settings[key], msg = check_value(_POSITIVE_NUMBER, value)
        if msg is not None:
            raise place.error(msg, key)
    if not 9.0 <= settings["moment_constant"] <= 9.2:
        raise place.error("moment_constant must be 9.05 (Hanks & Kanamori 1979) or 9.1", "moment_constant")
    return settings


def _source(kind, i, src, settings, seen, path, text, tally):
    """One ``[[faults]]``, ``[[areas]]`` or ``[[points]]`` table to its ruptures, summary row, magnitude range
    ``(row, column, min, max)`` (None without ruptures) and warnings; (None, None, None, []) when only counted."""
    place = toml_place(path, text, (kind,), f"{kind}[{i}]", i)
    if not isinstance(src, dict):
        raise place.error("expected a table")
    validate_table(src, _SOURCE_SCHEMAS[kind], place)
    sid = src["id"]
    if not isinstance(sid, str) or not sid.strip() or sid in seen:
        raise place.error(f"source id must be a unique non-empty string, got {sid!r}", "id")
    seen.add(sid)
    region = src.get("region", TECTONIC_REGIONS[0])
    if region not in TECTONIC_REGIONS:
        raise place.error(f"source {sid!r}: unknown tectonic region {region!r}; "
                          "valid: " + ", ".join(TECTONIC_REGIONS), "region")
    try:
        rs, info, doubts = _build(kind, src, settings, tally)
    except _FieldError as exc:
        if exc.table is not None:
            raise toml_place(path, text, (exc.table,), exc.table).error(f"source {sid!r}: {exc.msg}", exc.key) from None
        raise place.error(exc.msg, exc.key) from None
    except ValueError as exc:
        raise place.error(f"source {sid!r}: {exc}") from None
    if rs is None:  # counted only
        return None, None, None, []
    if region != TECTONIC_REGIONS[0]:
        rs = rs.with_region(region)
    notes = [InputWarning(path, f"{kind[:-1]} {sid!r}: {msg}", row=place.locate(key), column=place.column_of(key))
             for key, msg in doubts]
    mags = (place.locate("mfd"), place.column_of("mfd"), float(rs.mag.min()), float(rs.mag.max()),
            region) if len(rs) else None
    row = {"source_id": sid, "kind": kind[:-1], "region": region, **info, "n_ruptures": len(rs), "total_rate": float(rs.rate.sum())}
    return rs, row, mags, notes


def load_source_model(path, limit=None):
    """Read and validate a source-model file.

    Each source's ruptures are counted before they are built
    (:mod:`quakefolio.core.sources.counts`), so a file whose rupture count exceeds
    ``limit`` is refused before any rupture array is allocated, naming the key that makes
    the count explode (rupture step, magnitude bin width, area grid spacing, trace).

    Parameters
    ----------
    path : str or Path
        The source-model TOML file.
    limit : RuptureLimit, optional
        Most ruptures the file may have (default: no limit).

    Returns
    -------
    SourceModel
        Ruptures of every source, a summary row per source (for a fault: its length along the
        trace, width and area, and the magnitudes whose rupture is capped at it,
        :func:`~quakefolio.core.sources.faults.rupture_fit`), the file's sha256, each source's
        magnitude range and the doubts found (a fault whose largest ruptures do not fit on it).

    Raises
    ------
    InputError
        On the first problem, naming file, line and key (among them a self-crossing fault
        trace and a magnitude above :data:`~quakefolio.core.plausibility.MAX_MAGNITUDE`).
    """
    traces = []
    sets, summary, name, digest, magnitudes, notes = _read(path, _Tally(limit, build=True), traces)
    return SourceModel(str(path), name, RuptureSet.concat(sets), summary, digest, magnitudes, notes, traces)


def count_source_model(path, limit=None):
    """Number of ruptures a source-model file gives, counted without building any.

    Parameters
    ----------
    path : str or Path
        The source-model TOML file.
    limit : RuptureLimit, optional
        Most ruptures the file may have (default: no limit).

    Returns
    -------
    int
        ``len(load_source_model(path).ruptures)``.

    Raises
    ------
    InputError
        As :func:`load_source_model`, for every problem found before the ruptures are built.
    """
    tally = _Tally(limit, build=False)
    _read(path, tally)
    return tally.used


def _read(path, tally, traces=None):
    """Every source of a file in order: (rupture sets, summary rows, model name, sha256, magnitude ranges,
    warnings); each fault's (id, region, trace) appended to ``traces`` when given."""
    text, data, digest = read_toml(path)
    path = str(path)
    root = toml_place(path, text, (), "")
    validate_table(data, _TOP_SCHEMA, root)
    if data.get("format") != FORMAT_TAG:
        raise root.error(f"expected format = \"{FORMAT_TAG}\", got {data.get('format')!r}", "format")
    settings = _settings(data, path, text)
    sets, summary, seen, magnitudes, notes = [], [], set(), [], []
    for kind in ("faults", "areas", "points"):
        entries = data.get(kind, [])
        if not isinstance(entries, list):
            raise root.error(f"'{kind}' must be an array of tables ([[{kind}]])", kind)
        for i, src in enumerate(entries):
            rs, row, mags, doubts = _source(kind, i, src, settings, seen, path, text, tally)
            sets.append(rs)
            summary.append(row)
            magnitudes += [mags] if mags else []
            notes += doubts
            if kind == "faults" and traces is not None:  # the trace passed _build's checks
                points = tuple((float(p[0]), float(p[1])) for p in src["trace"])
                traces.append((row["source_id"], row["region"], points))
    if not sets:
        raise root.error("the source model defines no source ([[faults]], [[areas]] or [[points]])")
    return sets, summary, str(data.get("name", "")), digest, magnitudes, notes


def _hint(key, valid):
    return did_you_mean(key, valid, cutoff=0.6, otherwise=f"; valid keys: {', '.join(valid)}")


class _FieldError(Exception):
    def __init__(self, key, msg, table=None):
        self.key, self.msg, self.table = key, msg, table  # table: the key's table when not the source's


def _num(value, fail, *, positive=False, non_negative=False):
    rules = _POSITIVE_NUMBER if positive else _NON_NEGATIVE_NUMBER if non_negative else _NUMBER
    number, msg = check_value(rules, value)
    if msg is not None:
        fail(msg)
    return number


def _field(src, key, **kw):
    def fail(msg):
        raise _FieldError(key, msg)

    return _num(src[key], fail, **kw)


def _pairs(src, key, width):
    value = src[key]
    ok = isinstance(value, list) and value and all(
        isinstance(row, list) and len(row) == width and all(
            not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(v) for v in row)
        for row in value)
    if not ok:
        raise _FieldError(key, f"expected a list of [{', '.join(['number'] * width)}] entries")
    return [tuple(float(v) for v in row) for row in value]


def _check_top_magnitude(kind, spec, num):
    """Refuse a largest magnitude above :data:`~quakefolio.core.plausibility.MAX_MAGNITUDE`."""
    top = {"truncated_gr": "max_mag", "characteristic": "char_mag", "single": "mag"}[kind]
    if top in spec and num(top) > MAX_MAGNITUDE:
        raise _FieldError("mfd", f"{top} {num(top):g} is above any plausible earthquake (the largest recorded is Mw "
                                 f"9.5; magnitudes above {MAX_MAGNITUDE:g} are refused)")


def _mfd(src, settings, area_km2, tally):
    spec = src["mfd"]
    if not isinstance(spec, dict):
        raise _FieldError("mfd", "expected an inline table, e.g. { kind = \"truncated_gr\", ... }")
    kind = spec.get("kind")
    if kind not in _MFD_KEYS:
        raise _FieldError("mfd", f"mfd kind must be one of {', '.join(_MFD_KEYS)}, got {kind!r}")
    for key in spec:
        if key not in _MFD_KEYS[kind]:
            raise _FieldError("mfd", f"unknown mfd key '{key}' for kind '{kind}'{_hint(key, _MFD_KEYS[kind])}")

    def num(key, **kw):
        if key not in spec:
            raise _FieldError("mfd", f"mfd of kind '{kind}' needs '{key}'")

        def fail(msg):
            raise _FieldError("mfd", f"{key}: {msg}")

        return _num(spec[key], fail, **kw)

    rate_keys = {"truncated_gr": ("rate_above_min", "a_value", "slip_rate_mm_per_yr"),
                 "characteristic": ("total_rate", "slip_rate_mm_per_yr"),
                 "single": ("rate", "slip_rate_mm_per_yr")}[kind]
    given = [k for k in rate_keys if k in spec]
    if len(given) != 1:
        raise _FieldError("mfd", f"mfd of kind '{kind}' needs exactly one of {', '.join(rate_keys)}")
    _check_top_magnitude(kind, spec, num)
    slip = "slip_rate_mm_per_yr" in spec
    if slip and area_km2 is None:
        raise _FieldError("mfd", "slip_rate_mm_per_yr (moment balance) is only available for faults")
    mc = settings["moment_constant"]
    _check_bins(kind, spec, num, tally)
    if kind == "truncated_gr":
        kw = dict(b_value=num("b_value", positive=True), mmin=num("min_mag"), mmax=num("max_mag"),
                  bin_width=num("bin_width", positive=True) if "bin_width" in spec else 0.1)
        if slip:
            bins = truncated_gr(rate_above_mmin=1.0, **kw)
        elif "a_value" in spec:
            bins = truncated_gr(a_value=num("a_value"), **kw)
        else:
            bins = truncated_gr(rate_above_mmin=num("rate_above_min", non_negative=True), **kw)
    elif kind == "characteristic":
        kw = dict(b_value=num("b_value", positive=True), mmin=num("min_mag"), mchar=num("char_mag"),
                  bin_width=num("bin_width", positive=True) if "bin_width" in spec else 0.05, moment_constant=mc)
        bins = characteristic_yc85(total_rate=1.0 if slip else num("total_rate", non_negative=True), **kw)
    else:
        bins = single_magnitude(num("mag"), 1.0 if slip else num("rate", non_negative=True))
    info = {}
    if slip:
        moment_rate = moment_rate_from_slip(num("slip_rate_mm_per_yr", non_negative=True), area_km2,
                                            settings["shear_modulus_pa"])
        bins = moment_balanced(bins, moment_rate, moment_constant=mc)
        info = {"moment_rate_nm_per_yr": moment_rate, "fault_area_km2": area_km2}
    return bins, info


def _check_bins(kind, spec, num, tally):
    """Refuse a bin width giving more magnitude bins than ruptures may be built (before binning)."""
    if kind == "single" or tally.room() is None:
        return
    width = num("bin_width", positive=True) if "bin_width" in spec else (0.1 if kind == "truncated_gr" else 0.05)
    top = num("max_mag") if kind == "truncated_gr" else num("char_mag") + 0.25
    n = magnitude_bin_count(top - num("min_mag"), width)
    if n > tally.room():
        tally.take(n, "mfd", f"bin_width {width:g} gives {n:,} magnitude bins (each at least one rupture)")


def _fault_width(src, dip, upper, lower):
    """Refuse a fault plane wider down dip than :data:`MAX_FAULT_WIDTH_KM` (dip or depths mistyped)."""
    width = (lower - upper) / math.sin(math.radians(dip))
    if width > MAX_FAULT_WIDTH_KM:
        key = "lower_depth_km" if lower - upper > MAX_FAULT_WIDTH_KM / 2 else "dip_deg"
        raise _FieldError(key, f"dip_deg = {dip:g} with depths {upper:g}-{lower:g} km makes the fault plane "
                               f"{width:,.0f} km wide down dip ((lower_depth_km - upper_depth_km) / sin(dip)); "
                               f"no fault plane is wider than {MAX_FAULT_WIDTH_KM:,.0f} km")


def _count_fault(src, trace, dip, common, bins, settings, tally):
    """Count a fault's ruptures before building them; name the key that makes the count explode."""
    step = settings["rupture_step_km"]
    c = fault_rupture_count(src["id"], trace, dip_deg=dip, upper_depth_km=common["upper_depth_km"],
                            lower_depth_km=common["lower_depth_km"], rake_deg=_field(src, "rake_deg"), mags=bins.mag,
                            rupture_step_km=step, min_aspect_ratio=common["min_aspect_ratio"])
    what = (f"{c.n_ruptures:,} ruptures ({c.n_magnitudes:,} magnitudes x up to {c.max_down:,} positions down dip "
            f"x {c.max_along:,} along strike at rupture_step_km = {step:g})")
    if step < _SETTINGS["rupture_step_km"]:
        tally.take(c.n_ruptures, "rupture_step_km", what, table="settings")
    tally.take(c.n_ruptures, "mfd" if c.max_along * c.max_down < c.n_magnitudes else "trace", what)


def _count_points(kind, src, n_mags, depths, n_mechs, n_strikes, tally):
    """Count an area's or a point's ruptures before building them (area: grid points inside the polygon)."""
    per_point = point_rupture_count(n_mags, len(depths), n_mechs, n_strikes)
    factors = f"{n_mags:,} magnitudes x {len(depths)} depths x {n_mechs} mechanisms" + (
        f" x {n_strikes} strikes" if n_strikes > 1 else "")
    if kind == "points":
        tally.take(per_point, "mfd", f"{per_point:,} ruptures ({factors})")
        return
    grid = polygon_point_count(src["polygon"], _field(src, "spacing_km", positive=True))
    n = grid.n_points * per_point
    about = "" if grid.exact else "about "
    tally.take(n, "spacing_km", f"{about}{n:,} ruptures ({about}{grid.n_points:,} grid points at spacing_km = "
                                f"{grid.spacing_km:g} x {per_point:,} per point)")


def _build(kind, src, settings, tally):
    """One source's ruptures (None when only counted), its summary values and its doubts as (key, message)."""
    upper = _field(src, "upper_depth_km", non_negative=True)
    lower = _field(src, "lower_depth_km", positive=True)
    if not lower > upper:
        raise _FieldError("lower_depth_km", f"lower_depth_km ({lower:g}) must exceed upper_depth_km ({upper:g})")
    common = dict(upper_depth_km=upper, lower_depth_km=lower, min_aspect_ratio=settings["min_aspect_ratio"])
    if kind == "faults":
        return _build_fault(src, settings, tally, common)
    bins, info = _mfd(src, settings, None, tally)
    depths = _pairs(src, "hypo_depths", 2)
    mechs, n_mechs, n_strikes = _mechanisms(src)
    if kind == "areas":
        polygon = _pairs(src, "polygon", 2)
        if len(polygon) < 3:
            raise _FieldError("polygon", "an area polygon needs at least three [lon, lat] vertices")
    _count_points(kind, src, len(bins.mag), depths, n_mechs, n_strikes, tally)
    if not tally.build:
        return None, info, []
    if kind == "areas":
        rs = area_source_ruptures(src["id"], polygon, spacing_km=_field(src, "spacing_km", positive=True), mfd=bins,
                                  hypo_depths=depths, mechanisms=mechs, **common)
    else:
        rs = point_source_ruptures(src["id"], _field(src, "lon"), _field(src, "lat"), mfd=bins, hypo_depths=depths,
                                   mechanisms=mechs, **common)
    return rs, info, []


def _trace(src):
    trace = _pairs(src, "trace", 2)
    if len(trace) < 2:
        raise _FieldError("trace", "a fault trace needs at least two [lon, lat] points")
    crossing = polyline_self_crossing([p[0] for p in trace], [p[1] for p in trace])
    if crossing is not None:
        i, j = crossing
        raise _FieldError("trace", f"the fault trace crosses itself (segment {i + 1} meets segment {j + 1}, "
                                   "counting from the first point); give the points in order along the fault")
    return trace


def _build_fault(src, settings, tally, common):
    """A fault's ruptures (planar for two trace points, bent for more), summary values and doubts."""
    trace = _trace(src)
    dip = _field(src, "dip_deg", positive=True)
    if dip > 90:
        raise _FieldError("dip_deg", f"dip must lie in (0, 90], got {dip:g}")
    rake = _field(src, "rake_deg")
    upper, lower = common["upper_depth_km"], common["lower_depth_km"]
    _fault_width(src, dip, upper, lower)
    try:
        frame = fault_frame(src["id"], trace, dip, upper, lower)
    except ValueError as exc:
        raise _FieldError("trace", str(exc)) from None
    bins, info = _mfd(src, settings, fault_plane_area_km2(trace, dip, upper, lower), tally)
    fit = rupture_fit(frame, bins.mag, rake, min_aspect_ratio=common["min_aspect_ratio"])
    info = {**info, "fault_length_km": fit.fault_length_km, "fault_width_km": fit.fault_width_km,
            "mags_capped": [round(float(m), 6) for m in fit.mag[fit.capped]],
            "mags_area_above_fault": [round(float(m), 6) for m in fit.mag[fit.area_above_fault]]}
    _count_fault(src, trace, dip, common, bins, settings, tally)
    if not tally.build:
        return None, info, []
    rs = fault_ruptures(src["id"], trace, dip_deg=dip, rake_deg=rake, mfd=bins,
                        rupture_step_km=settings["rupture_step_km"], **common)
    return rs, info, _fit_doubts(fit)


def _magnitude_list(mags):
    """'M 6.7', 'M 6.5 and 6.7', 'M 6.3, 6.5 and 6.7', or 'M 6.1 to 7.1 (11 magnitudes)' beyond six."""
    text = [f"{m:g}" for m in mags]
    if len(text) > 6:
        return f"M {text[0]} to {text[-1]} ({len(text)} magnitudes)"
    return "M " + (text[0] if len(text) == 1 else f"{', '.join(text[:-1])} and {text[-1]}")


def _fit_doubts(fit):
    """The warning of a fault whose largest ruptures are capped at it, as (key, message); none when all fit."""
    capped = fit.capped
    if not capped.any():
        return []
    area = fit.area_km2[capped]
    return [("mfd", f"the ruptures of {_magnitude_list(fit.mag[capped])} do not fit on the fault "
                    f"({fit.fault_length_km:.1f} km along the trace x {fit.fault_width_km:.1f} km down dip = "
                    f"{fit.fault_area_km2:.0f} km2; Wells & Coppersmith 1994: up to {fit.length_km[capped].max():.1f} "
                    f"km long, {area.max():.0f} km2): each is capped at the fault length and keeps its rate")]


def _mechanisms(src):
    """``(strike, dip, rake, weight)`` mechanisms of a point or area source, the number of mechanisms and of
    strikes: ``mechanisms`` with their strikes, or without, crossed with ``strikes`` or ``uniform_strikes``."""
    given = [key for key in _STRIKE_KEYS if key in src]
    if len(given) > 1:
        raise _FieldError(given[1], "give either 'strikes' or 'uniform_strikes', not both")
    if not given:
        try:
            mechs = _pairs(src, "mechanisms", 4)
        except _FieldError as exc:
            raise _FieldError("mechanisms", f"{exc.msg} ([strike_deg, dip_deg, rake_deg, weight]; or [dip_deg, "
                                            "rake_deg, weight] with 'strikes' or 'uniform_strikes')") from None
        return mechs, len(mechs), 1
    try:
        mechs = _pairs(src, "mechanisms", 3)
    except _FieldError as exc:
        raise _FieldError("mechanisms", f"{exc.msg}: with '{given[0]}' each mechanism is [dip_deg, rake_deg, weight], "
                                        f"its strike taken from '{given[0]}'") from None
    try:
        if given[0] == "strikes":
            strikes = strike_distribution(_pairs(src, "strikes", 2))
        else:
            strikes = uniform_strikes(src["uniform_strikes"])
    except ValueError as exc:
        raise _FieldError(given[0], str(exc)) from None
    return mechanisms_with_strikes(mechs, strikes), len(mechs), len(strikes)
