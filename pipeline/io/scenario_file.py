"""Scenario-earthquake files: the scenario TOML (ruptures, realisations) and the station CSV.

A scenario file (``format = "quakefolio-scenario-1"``) lists ``[[ruptures]]`` tables, each either

* a rupture of the run's source model: ``source_id`` and optionally ``magnitude`` [Mw] (default:
  the source's largest; the rupture of that magnitude in the middle of its floating positions), or
* a rupture of its own: ``magnitude`` [Mw], ``hypocentre = [lon, lat, depth_km]``, ``strike_deg``,
  ``dip_deg``, ``rake_deg`` and the seismogenic layer ``upper_depth_km``/``lower_depth_km`` [km];
  length and width follow from the magnitude (Wells & Coppersmith 1994, as for point sources) unless
  ``length_km`` and ``width_km`` give them (the plane then centred on the hypocentre).

with top-level ``realisations``, ``seed``, ``percentiles`` [%] and optional ``stations_file`` and
``station_sigma_ln``. The station file (CSV or Parquet) has columns ``station_id``, ``lon``, ``lat``
[deg], ``im`` (``PGA``, ``SA_<T>``), ``observed_g`` [g] and optional ``vs30_mps`` [m/s] and
``sigma_ln`` [ln units] (measurement error of the record; default ``station_sigma_ln``).
Every problem is an :class:`~quakefolio.core.errors.InputError` naming file, row and key or column.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError
from quakefolio.core.ims import parse_im
from quakefolio.core.plausibility import LEVEL_ERROR_ABOVE_G, MAX_MAGNITUDE, unit_advice, vs30_problem
from quakefolio.core.validation import (
    Field, Integer, Interval, ListOf, Pattern, Real, Schema, Text, toml_place, validate_table,
)
from quakefolio.fragility.library import read_toml
from quakefolio.pipeline.io.ingest import NON_NEGATIVE, POSITIVE, _identifiers, _numbers, read_table

__all__ = ["FORMAT_TAG", "ScenarioRupture", "ScenarioSpec", "Stations", "read_scenario", "read_stations"]

FORMAT_TAG = "quakefolio-scenario-1"
#: Largest number of realisations per rupture (memory: realisations x sites x IMs floats).
MAX_REALISATIONS = 100_000

_FLOAT = (Real(finite=True),)
_ID = Pattern(r"^[A-Za-z0-9_.\-]{1,64}$", "expected an id of 1-64 letters, digits, '_', '-', '.'")
_MAG = Interval(0, MAX_MAGNITUDE, closed="right", message=f"expected a magnitude in (0, {MAX_MAGNITUDE:g}] Mw")
_TOP = Schema({
    "format": Field((Text(),)),
    "name": Field((Text(),), ""),
    "realisations": Field((Integer(), Interval(1, MAX_REALISATIONS, message="expected an integer from 1 to "
                                                f"{MAX_REALISATIONS:,}")), 1000),
    "seed": Field((Integer(), Interval(0, None, message="expected a non-negative integer")), 1),
    "percentiles": Field((ListOf(Interval(0, 100, closed="neither"), "expected strictly increasing percentiles "
                                 "in (0, 100)", min_len=1, increasing=True),), [50.0, 90.0]),
    "source_branch": Field((Text(),), ""),
    "stations_file": Field((Text("expected a file path string", non_empty=True),), None),
    "station_sigma_ln": Field(_FLOAT + (Interval(0, 3, message="expected a standard deviation in [0, 3] ln units"),),
                              0.0),
    "ruptures": Field((ListOf(message="expected at least one [[ruptures]] table", min_len=1),)),
})
_RUPTURE = Schema({
    "id": Field((Text(), _ID)),
    "source_id": Field((Text(non_empty=True),), None),
    "rupture_index": Field((Integer(), Interval(0, None, message="expected a non-negative integer")), None),
    "magnitude": Field(_FLOAT + (_MAG,), None),
    "hypocentre": Field((ListOf(Real(finite=True), "expected [lon, lat, depth_km]", min_len=3),), None),
    "strike_deg": Field(_FLOAT + (Interval(0, 360, closed="left"),), None),
    "dip_deg": Field(_FLOAT + (Interval(0, 90, closed="right"),), None),
    "rake_deg": Field(_FLOAT + (Interval(-180, 180),), None),
    "upper_depth_km": Field(_FLOAT + (Interval(0, None),), 0.0),
    "lower_depth_km": Field(_FLOAT + (Interval(0, None, closed="neither"),), 20.0),
    "length_km": Field(_FLOAT + (POSITIVE,), None),
    "width_km": Field(_FLOAT + (POSITIVE,), None),
})
#: Keys of a rupture of its own: the required ones first, then the optional plane size.
_OWN_KEYS = ("magnitude", "hypocentre", "strike_deg", "dip_deg", "rake_deg", "length_km", "width_km")
_NEEDED = _OWN_KEYS[:5]
STATION_COLUMNS = {"station_id": True, "lon": True, "lat": True, "im": True, "observed_g": True,
                   "vs30_mps": False, "sigma_ln": False}


@dataclass(frozen=True)
class ScenarioRupture:
    """One rupture of a scenario file (``source_id`` or ``rupture_index`` set: from the source model; else its own)."""

    id: str
    source_id: str | None
    magnitude: float | None
    hypocentre: tuple | None = None  # (lon [deg], lat [deg], depth [km])
    strike_deg: float = 0.0
    dip_deg: float = 90.0
    rake_deg: float = 0.0
    upper_depth_km: float = 0.0
    lower_depth_km: float = 20.0
    length_km: float | None = None  # with width_km: the plane's own size, centred on the hypocentre
    width_km: float | None = None
    row: int | None = None  # line of the [[ruptures]] header, for errors
    rupture_index: int | None = None  # a rupture of the source model by its index (rupture_id of event_loss)


@dataclass(frozen=True)
class Stations:
    """Validated station records (one row per station and IM)."""

    path: Path
    station_id: np.ndarray
    lon: np.ndarray  # [deg]
    lat: np.ndarray  # [deg]
    im: np.ndarray  # canonical IM names
    observed_g: np.ndarray  # [g]
    vs30_mps: np.ndarray  # [m/s], NaN: the run's default
    sigma_ln: np.ndarray  # [ln units]
    rows: np.ndarray  # file row of each record


@dataclass(frozen=True)
class ScenarioSpec:
    """A validated scenario file."""

    path: Path
    name: str
    realisations: int
    seed: int
    percentiles: tuple
    source_branch: str
    ruptures: tuple
    stations: Stations | None
    sha256: str


def _from_source_model(v, place, row):
    """A rupture of the source model (``rupture_index`` or ``source_id``), or None for one of its own."""
    if v["rupture_index"] is not None:
        extra = [k for k in ("source_id", "magnitude", *_OWN_KEYS[1:]) if v[k] is not None]
        if extra:
            raise place.error(f"'{extra[0]}' does not apply to a rupture given by rupture_index (the rupture_id of "
                              "the event tables); give one of rupture_index, source_id or the rupture's own "
                              "geometry", extra[0])
        return ScenarioRupture(v["id"], None, None, row=row, rupture_index=int(v["rupture_index"]))
    if v["source_id"] is not None:
        extra = [k for k in _OWN_KEYS[1:] if v[k] is not None]
        if extra:
            raise place.error(f"'{extra[0]}' does not apply to a rupture of the source model (source_id); give "
                              "either source_id or the rupture's own geometry", extra[0])
        return ScenarioRupture(v["id"], v["source_id"], v["magnitude"], row=row)
    return None


def _plane_size(v, place, i, depth, upper, lower):
    """(length_km, width_km) given together, or (None, None); the plane must stay inside the layer."""
    size = (v["length_km"], v["width_km"])
    if (size[0] is None) != (size[1] is None):
        key = "width_km" if size[1] is None else "length_km"
        raise place.error(f"give length_km and width_km together (or neither: sizes from the magnitude); missing "
                          f"'{key}'", None, column=f"ruptures[{i}].{key}")
    if size[1] is not None:
        half = 0.5 * size[1] * math.sin(math.radians(v["dip_deg"]))
        if depth - half < upper - 1e-9 or depth + half > lower + 1e-9:
            raise place.error(f"a plane of width {size[1]:g} km centred on the hypocentre reaches from "
                              f"{depth - half:.3g} to {depth + half:.3g} km depth, outside the layer "
                              f"[{upper:g}, {lower:g}] km", "width_km")
    return size


def _rupture(i, entry, path, text):
    place = toml_place(path, text, ("ruptures",), f"ruptures[{i}]", occurrence=i)
    if not isinstance(entry, dict):
        raise place.error("expected a table ([[ruptures]])")
    v = validate_table(entry, _RUPTURE, place)
    row = place.locate(None)
    known = _from_source_model(v, place, row)
    if known is not None:
        return known
    missing = [k for k in _NEEDED if v[k] is None]
    if missing:
        raise place.error(f"a rupture needs source_id, or its own {', '.join(_NEEDED)}; missing '{missing[0]}'",
                          None, column=f"ruptures[{i}].{missing[0]}")
    lon, lat, depth = (float(x) for x in v["hypocentre"][:3])
    if len(v["hypocentre"]) != 3 or not (-180 <= lon <= 180 and -90 <= lat <= 90):
        raise place.error(f"expected [lon, lat, depth_km] with lon in [-180, 180] and lat in [-90, 90], got "
                          f"{v['hypocentre']!r}", "hypocentre")
    upper, lower = v["upper_depth_km"], v["lower_depth_km"]
    if not upper < lower:
        raise place.error(f"upper_depth_km {upper:g} must be below lower_depth_km {lower:g}", "lower_depth_km")
    if not upper <= depth <= lower:
        raise place.error(f"hypocentre depth {depth:g} km lies outside the layer [{upper:g}, {lower:g}] km",
                          "hypocentre")
    size = _plane_size(v, place, i, depth, upper, lower)
    return ScenarioRupture(v["id"], None, v["magnitude"], (lon, lat, depth), v["strike_deg"], v["dip_deg"],
                           v["rake_deg"], upper, lower, size[0], size[1], row)


def read_scenario(path):
    """Read and validate a scenario file and its station file.

    Parameters
    ----------
    path : str or Path
        The scenario TOML file.

    Returns
    -------
    ScenarioSpec

    Raises
    ------
    InputError
        Syntax, unknown or missing keys, values out of range, duplicate rupture ids, or a bad
        station file (file, line and key or column).
    """
    path = Path(path)
    text, data, digest = read_toml(path)
    root = toml_place(str(path), text, (), "")
    v = validate_table(data, _TOP, root)
    if v["format"] != FORMAT_TAG:
        raise root.error(f"expected format = \"{FORMAT_TAG}\", got {v['format']!r}", "format")
    ruptures = tuple(_rupture(i, e, str(path), text) for i, e in enumerate(v["ruptures"]))
    seen = set()
    for i, r in enumerate(ruptures):
        if r.id in seen:
            raise InputError(path, f"duplicate rupture id {r.id!r}", row=r.row, column=f"ruptures[{i}].id")
        seen.add(r.id)
    stations = None
    if v["stations_file"] is not None:
        stations = read_stations(path.parent / v["stations_file"], v["station_sigma_ln"])
    return ScenarioSpec(path, v["name"], int(v["realisations"]), int(v["seed"]),
                        tuple(float(p) for p in v["percentiles"]), v["source_branch"], ruptures, stations, digest)


def _same_point(path, ids, lon, lat, ims, sigma, rows):
    """Two exact records (sigma_ln 0) of one IM at one point cannot both hold: an error at the second."""
    seen = {}
    for i in range(len(ids)):
        if sigma[i] > 0:
            continue
        k = (float(lon[i]), float(lat[i]), ims[i])
        if k in seen and str(ids[seen[k]]) != str(ids[i]):
            j = seen[k]
            raise InputError(path, f"station {str(ids[i])!r} records {ims[i]} at the position of station "
                                   f"{str(ids[j])!r} (row {int(rows[j])}) and both without a measurement error: "
                                   "give sigma_ln > 0 to one or both", row=int(rows[i]), column="sigma_ln")
        seen.setdefault(k, i)


def read_stations(path, default_sigma_ln=0.0):
    """Read and validate a station file.

    Parameters
    ----------
    path : Path
        CSV or Parquet with the columns of :data:`STATION_COLUMNS`.
    default_sigma_ln : float [ln units]
        Measurement standard deviation of records without ``sigma_ln``.

    Returns
    -------
    Stations

    Raises
    ------
    InputError
        Missing columns or cells, numbers out of range (lon, lat, observed value above
        :data:`~quakefolio.core.plausibility.LEVEL_ERROR_ABOVE_G` g with its likely unit, Vs30 that
        is no ground), an unknown IM name, or one station and IM given twice (row and column).
    """
    frame, rows = read_table(path, STATION_COLUMNS)
    ids = _identifiers(frame, rows, path, "station_id")
    lon = _numbers(frame, rows, path, "lon", (Interval(-180, 180),))
    lat = _numbers(frame, rows, path, "lat", (Interval(-90, 90),))
    obs = _numbers(frame, rows, path, "observed_g", (POSITIVE,))
    n = len(ids)
    vs30 = _numbers(frame, rows, path, "vs30_mps", (POSITIVE,), required=False) \
        if "vs30_mps" in frame.columns else np.full(n, np.nan)
    sigma = _numbers(frame, rows, path, "sigma_ln", (NON_NEGATIVE,), required=False) \
        if "sigma_ln" in frame.columns else np.full(n, np.nan)
    sigma = np.where(np.isnan(sigma), float(default_sigma_ln), sigma)
    ims = []
    for i, name in enumerate(frame["im"].astype(str).str.strip()):
        try:
            ims.append(parse_im(name))
        except ValueError as exc:
            raise InputError(path, str(exc), row=int(rows[i]), column="im") from None
    for i in range(n):
        if obs[i] > LEVEL_ERROR_ABOVE_G:
            hint = unit_advice(obs[i], "g", 1e-4, LEVEL_ERROR_ABOVE_G, {}) or "; observed values are in g"
            raise InputError(path, f"observed {obs[i]:g} g is far above any recorded ground motion{hint}",
                             row=int(rows[i]), column="observed_g")
        problem = vs30_problem(vs30[i])
        if problem:
            raise InputError(path, problem, row=int(rows[i]), column="vs30_mps")
    _same_point(path, ids, lon, lat, ims, sigma, rows)
    key = [f"{s}\x00{m}" for s, m in zip(ids, ims)]
    first = {}
    for i, k in enumerate(key):
        if k in first:
            raise InputError(path, f"station {str(ids[i])!r} gives {ims[i]} twice (first at row {int(rows[first[k]])})",
                             row=int(rows[i]), column="im")
        first[k] = i
    return Stations(Path(path), np.asarray(ids, dtype=object), lon, lat, np.asarray(ims, dtype=object), obs, vs30,
                    sigma, np.asarray(rows))
