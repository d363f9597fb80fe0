r"""Earthquake ruptures of a source model as a structure of arrays.

Sources become :class:`RuptureSet` objects, one row per finite rectangular rupture with
its magnitude, annual rate, mechanism, depths, dimensions and corner coordinates; the
hazard engine consumes them together with :mod:`quakefolio.core.sources.geometry` (distances)
and :mod:`quakefolio.core.gmm` (ground motion).

Source types
------------
:func:`planar_fault_ruptures`
    A planar fault (straight trace, dip, seismogenic depths) on which ruptures of each
    magnitude float along strike and down dip (a trace of more points is a bent fault:
    :func:`quakefolio.core.sources.faults.fault_ruptures`).
:func:`point_source_ruptures`
    A point with distributions of hypocentral depth and mechanism; each rupture is a
    finite plane about the hypocentre.
:func:`area_source_ruptures`
    A polygon gridded into point sources sharing the source's rate equally.

Rupture dimensions follow Wells & Coppersmith (1994), Table 2A (:func:`wc94_dimensions`),
with a minimum aspect ratio and the down-dip width limited by the seismogenic layer.

Conventions
-----------
Strike is an azimuth [deg] clockwise from north; the plane dips to the right of the
strike direction (Aki & Richards 2002). The four corners of a rupture are, in order,
top-start, top-end, bottom-end and bottom-start, "start -> end" being the strike
direction; each corner is (lon [deg], lat [deg], depth [km]). Local geometry is built in
the azimuthal equidistant projection of :mod:`quakefolio.core.sources.geometry` and converted
back to lon/lat.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field, fields
from typing import NamedTuple, Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray

from quakefolio.core.sources.geometry import aeqd_forward, aeqd_inverse, mean_position, points_in_polygon
from quakefolio.core.gmm import TECTONIC_REGIONS, mechanism_flags
from quakefolio.core.sources.mfd import MagnitudeBins

__all__ = [
    "RuptureSet",
    "SLIP_TYPES",
    "WC94_TABLE_2A",
    "slip_type_from_rake",
    "wc94_dimensions",
    "rupture_corners",
    "polygon_grid",
    "polygon_frame",
    "PolygonFrame",
    "fault_frame",
    "FaultFrame",
    "fault_rupture_dimensions",
    "planar_fault_ruptures",
    "point_source_ruptures",
    "area_source_ruptures",
]

FloatArray = NDArray[np.float64]

_FLOAT_FIELDS = (
    "mag", "rate", "strike_deg", "dip_deg", "rake_deg",
    "ztor_km", "zbot_km", "width_km", "length_km", "zhyp_km",
)


# --------------------------------------------------------------------------- #
# RuptureSet
# --------------------------------------------------------------------------- #
@dataclass(frozen=True, eq=False)
class RuptureSet:
    """Ruptures as a structure of arrays (all arrays read-only, length ``n``).

    Attributes
    ----------
    source_index : ndarray of int, shape (n,)
        Index into ``source_ids`` of each rupture's source.
    source_ids : tuple of str
        Source identifiers, unique.
    mag : ndarray, shape (n,) [Mw]
    rate : ndarray, shape (n,) [1/yr]
        Annual rate of occurrence, >= 0.
    strike_deg, dip_deg, rake_deg : ndarray, shape (n,) [deg]
        Strike in [0, 360), dip in (0, 90], rake in [-180, 180].
    ztor_km, zbot_km : ndarray, shape (n,) [km]
        Depth of the top and bottom edges, ``0 <= ztor <= zbot``.
    width_km, length_km : ndarray, shape (n,) [km]
        Down-dip width and along-strike length (along the trace on a bent fault), > 0.
    zhyp_km : ndarray, shape (n,) [km]
        Hypocentral depth (the centre of the plane unless a source says otherwise).
    corners : ndarray, shape (n, 4, 3)
        (lon [deg], lat [deg], depth [km]) of the top-start, top-end, bottom-end and
        bottom-start corners; the plane dips to the right of start -> end. The distance
        code (:func:`quakefolio.core.sources.geometry.rupture_distances`) uses the two top
        corners with ``ztor_km``, ``dip_deg`` and ``width_km``; the bottom corners are for
        display and checks. Construction checks the corner depths against
        ``ztor_km``/``zbot_km`` and ``zbot_km = ztor_km + width_km sin(dip)`` (1e-6 km).
        For a rupture made of several pieces (below) they are the outline: top-start and
        bottom-start of its first piece, top-end and bottom-end of its last.
    piece_rupture : ndarray of int, shape (m,)
        Ruptures on a bent fault are the union of rectangles ("pieces"), one per fault
        segment they span: the rupture each piece belongs to, non-decreasing, each listed
        rupture with at least two pieces. A rupture without pieces is the one rectangle of
        its ``corners``. Default: no pieces.
    piece_corners : ndarray, shape (m, 4, 3)
        Corners of each piece as ``corners`` orders them, the pieces of a rupture in order
        along the fault, each at its rupture's ``ztor_km``/``zbot_km``, ``dip_deg`` and
        ``width_km``; the distance code uses their top edges.
    region_code : ndarray of int8, shape (n,)
        Tectonic region of each rupture's source as an index into
        :data:`quakefolio.core.gmm.TECTONIC_REGIONS` (0, ``active_crustal``, by default);
        the hazard engine evaluates each rupture with its region's ground-motion models
        and, for the subduction regions, the event type (interface or intraslab) follows
        from it. Default: every rupture active crustal.

    Raises
    ------
    ValueError
        If shapes disagree or a value breaks its constraint (with the field and index).
    """

    source_index: NDArray[np.int64]
    source_ids: tuple
    mag: FloatArray
    rate: FloatArray
    strike_deg: FloatArray
    dip_deg: FloatArray
    rake_deg: FloatArray
    ztor_km: FloatArray
    zbot_km: FloatArray
    width_km: FloatArray
    length_km: FloatArray
    zhyp_km: FloatArray
    corners: FloatArray
    piece_rupture: NDArray[np.int64] = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    piece_corners: FloatArray = field(default_factory=lambda: np.zeros((0, 4, 3)))
    region_code: NDArray[np.int8] | None = None

    def __post_init__(self) -> None:
        ids = tuple(self.source_ids)
        if not all(isinstance(s, str) and s for s in ids):
            raise ValueError("RuptureSet: source_ids must be non-empty strings")
        if len(set(ids)) != len(ids):
            dup = sorted({s for s in ids if ids.count(s) > 1})
            raise ValueError(f"RuptureSet: duplicate source ids {dup}")
        object.__setattr__(self, "source_ids", ids)
        index = np.array(self.source_index, dtype=np.int64).reshape(-1)
        n = index.size
        if n and (index.min() < 0 or index.max() >= len(ids)):
            raise ValueError("RuptureSet: source_index out of range of source_ids")
        index.setflags(write=False)
        object.__setattr__(self, "source_index", index)
        for name in _FLOAT_FIELDS:
            arr = np.array(getattr(self, name), dtype=np.float64).reshape(-1)
            if arr.size != n:
                raise ValueError(f"RuptureSet: {name!r} has {arr.size} values, expected {n}")
            if not np.all(np.isfinite(arr)):
                raise ValueError(f"RuptureSet: {name!r} must be finite")
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        corners = np.array(self.corners, dtype=np.float64)
        if corners.shape != (n, 4, 3):
            raise ValueError(f"RuptureSet: 'corners' must have shape ({n}, 4, 3); got {corners.shape}")
        if not np.all(np.isfinite(corners)):
            raise ValueError("RuptureSet: 'corners' must be finite")
        corners.setflags(write=False)
        object.__setattr__(self, "corners", corners)
        self._set_pieces(n)
        self._set_regions(n)
        self._check_constraints()

    def _set_regions(self, n: int) -> None:
        code = np.zeros(n, dtype=np.int8) if self.region_code is None else np.array(self.region_code).reshape(-1)
        if code.size != n:
            raise ValueError(f"RuptureSet: 'region_code' has {code.size} values, expected {n}")
        if n and (code.min() < 0 or code.max() >= len(TECTONIC_REGIONS)):
            raise ValueError(f"RuptureSet: 'region_code' must index {TECTONIC_REGIONS}")
        code = code.astype(np.int8)
        code.setflags(write=False)
        object.__setattr__(self, "region_code", code)

    @property
    def regions(self) -> tuple[str, ...]:
        """Tectonic regions present, in :data:`~quakefolio.core.gmm.TECTONIC_REGIONS` order."""
        return tuple(TECTONIC_REGIONS[i] for i in np.unique(self.region_code))

    def with_region(self, region: str) -> "RuptureSet":
        """The same ruptures, all of tectonic region ``region`` (a :data:`TECTONIC_REGIONS` name)."""
        if region not in TECTONIC_REGIONS:
            raise ValueError(f"unknown tectonic region {region!r}; valid: " + ", ".join(TECTONIC_REGIONS))
        out = {f.name: getattr(self, f.name) for f in fields(self)}
        out["region_code"] = np.full(len(self), TECTONIC_REGIONS.index(region), dtype=np.int8)
        return RuptureSet(**out)

    def _set_pieces(self, n: int) -> None:
        owner = np.array(self.piece_rupture, dtype=np.int64).reshape(-1)
        pieces = np.array(self.piece_corners, dtype=np.float64).reshape(-1, 4, 3)
        if pieces.shape[0] != owner.size:
            raise ValueError(f"RuptureSet: 'piece_corners' must have shape ({owner.size}, 4, 3); got {pieces.shape}")
        if not np.all(np.isfinite(pieces)):
            raise ValueError("RuptureSet: 'piece_corners' must be finite")
        if owner.size:
            if owner.min() < 0 or owner.max() >= n or np.any(np.diff(owner) < 0):
                raise ValueError("RuptureSet: 'piece_rupture' must be non-decreasing rupture indices")
            if np.any(np.unique(owner, return_counts=True)[1] < 2):
                raise ValueError("RuptureSet: a rupture with pieces needs at least two")
        for name, arr in (("piece_rupture", owner), ("piece_corners", pieces)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    def _check_constraints(self) -> None:
        def need(name, ok, text):
            if not np.all(ok):
                i = int(np.argmin(ok))
                raise ValueError(f"RuptureSet: {name!r} must be {text}; got {getattr(self, name)[i]!r} at index {i}")

        need("rate", self.rate >= 0.0, ">= 0")
        need("dip_deg", (self.dip_deg > 0.0) & (self.dip_deg <= 90.0), "in (0, 90]")
        need("rake_deg", np.abs(self.rake_deg) <= 180.0, "in [-180, 180]")
        need("strike_deg", (self.strike_deg >= 0.0) & (self.strike_deg < 360.0), "in [0, 360)")
        need("width_km", self.width_km > 0.0, "> 0")
        need("length_km", self.length_km > 0.0, "> 0")
        need("ztor_km", self.ztor_km >= 0.0, ">= 0")
        tol = 1e-6
        need("zbot_km", np.abs(self.zbot_km - self.ztor_km - self.width_km * np.sin(np.radians(self.dip_deg))) <= tol,
             "ztor_km + width_km * sin(dip)")
        need("zhyp_km", (self.zhyp_km >= self.ztor_km - tol) & (self.zhyp_km <= self.zbot_km + tol),
             "between ztor_km and zbot_km")
        depth = self.corners[:, :, 2]
        need("corners", (np.abs(depth[:, :2] - self.ztor_km[:, None]) <= tol).all(axis=1)
             & (np.abs(depth[:, 2:] - self.zbot_km[:, None]) <= tol).all(axis=1),
             "at depths (ztor, ztor, zbot, zbot)")
        if self.piece_rupture.size:
            owner, depth = self.piece_rupture, self.piece_corners[:, :, 2]
            ok = ((np.abs(depth[:, :2] - self.ztor_km[owner, None]) <= tol).all(axis=1)
                  & (np.abs(depth[:, 2:] - self.zbot_km[owner, None]) <= tol).all(axis=1))
            if not np.all(ok):
                raise ValueError(f"RuptureSet: piece {int(np.argmin(ok))} is not at its rupture's depths "
                                 "(ztor, ztor, zbot, zbot)")

    @property
    def n_pieces(self) -> NDArray[np.int64]:
        """Pieces of each rupture, shape (n,): 0 for a single rectangle, else at least 2."""
        return np.bincount(self.piece_rupture, minlength=len(self)).astype(np.int64)

    def __len__(self) -> int:
        return int(self.mag.size)

    @property
    def total_rate(self) -> float:
        """Sum of the rupture rates [1/yr]."""
        return float(np.sum(self.rate))

    @classmethod
    def empty(cls) -> "RuptureSet":
        """A set with no rupture and no source."""
        z = np.zeros(0)
        return cls(np.zeros(0, dtype=np.int64), (), *(z for _ in _FLOAT_FIELDS), np.zeros((0, 4, 3)))

    @classmethod
    def concat(cls, sets: Sequence["RuptureSet"]) -> "RuptureSet":
        """Join sets in order.

        Source ids are merged by name: the result's ``source_ids`` lists every id once, in
        order of first appearance, and an id that occurs in several sets (e.g. subsets of
        one set) denotes the same source. Keeping ids unique across a source model is the
        job of whoever builds the sets.
        """
        sets = list(sets)
        if not sets:
            return cls.empty()
        position: dict[str, int] = {}
        index, owners, first = [], [], 0
        for s in sets:
            if not isinstance(s, RuptureSet):
                raise ValueError(f"RuptureSet.concat: expected RuptureSet items; got {type(s).__name__}")
            remap = np.array([position.setdefault(sid, len(position)) for sid in s.source_ids], dtype=np.int64)
            index.append(remap[s.source_index] if remap.size else s.source_index)
            owners.append(s.piece_rupture + first)
            first += len(s)
        return cls(
            np.concatenate(index),
            tuple(position),
            *(np.concatenate([getattr(s, name) for s in sets]) for name in _FLOAT_FIELDS),
            np.concatenate([s.corners for s in sets]),
            np.concatenate(owners),
            np.concatenate([s.piece_corners for s in sets]),
            np.concatenate([s.region_code for s in sets]),
        )

    def subset(self, mask: ArrayLike) -> "RuptureSet":
        """The ruptures selected by a boolean mask of length ``n`` or by integer indices.

        ``source_ids`` is kept whole, so ``source_index`` keeps its meaning.
        """
        sel = np.asarray(mask)
        if sel.dtype == bool:
            if sel.shape != (len(self),):
                raise ValueError(f"RuptureSet.subset: boolean mask must have shape ({len(self)},); got {sel.shape}")
        elif not np.issubdtype(sel.dtype, np.integer):
            raise ValueError("RuptureSet.subset: mask must be boolean or integer indices")
        values = {f.name: getattr(self, f.name) for f in fields(self) if not f.name.startswith("piece_")}
        out = {name: (value if name == "source_ids" else value[sel]) for name, value in values.items()}
        if self.piece_rupture.size:
            chosen = np.arange(len(self))[sel]  # rupture of each row of the subset
            counts = self.n_pieces[chosen]
            first = np.searchsorted(self.piece_rupture, chosen)
            row_start = np.cumsum(counts) - counts
            piece = np.repeat(first - row_start, counts) + np.arange(int(counts.sum()))
            out["piece_rupture"] = np.repeat(np.arange(chosen.size), counts)
            out["piece_corners"] = self.piece_corners[piece]
        return RuptureSet(**out)


# --------------------------------------------------------------------------- #
# Wells & Coppersmith (1994) dimensions
# --------------------------------------------------------------------------- #
#: Slip-type classes of Wells & Coppersmith (1994).
SLIP_TYPES = ("strike_slip", "reverse", "normal", "all")

#: Wells & Coppersmith (1994), Table 2A: ``log10(y) = a + b * M`` for subsurface rupture
#: length ``y`` = RLD [km], down-dip rupture width RW [km] and rupture area RA [km^2],
#: as (a, b) per slip type. RLD strike-slip and reverse and RW strike-slip were checked
#: against a published reproduction of the table; the other entries are from memory.
WC94_TABLE_2A = {
    "length": {"strike_slip": (-2.57, 0.62), "reverse": (-2.42, 0.58), "normal": (-1.88, 0.50), "all": (-2.44, 0.59)},
    "width": {"strike_slip": (-0.76, 0.27), "reverse": (-1.61, 0.41), "normal": (-1.14, 0.35), "all": (-1.01, 0.32)},
    "area": {"strike_slip": (-3.42, 0.90), "reverse": (-3.99, 0.98), "normal": (-2.87, 0.82), "all": (-3.49, 0.91)},
}


def slip_type_from_rake(rake_deg: ArrayLike) -> NDArray[np.str_]:
    """Wells & Coppersmith (1994) slip type of each rake [deg].

    Parameters
    ----------
    rake_deg : array_like [deg]
        Rake in [-180, 180].

    Returns
    -------
    ndarray of str, shape of ``rake_deg``
        ``"reverse"``, ``"normal"`` or ``"strike_slip"``.

    Notes
    -----
    The rake classes are those of the ground-motion models,
    :func:`quakefolio.core.gmm.mechanism_flags` (the one definition: reverse for
    30 < rake < 150, normal for -150 < rake < -30, strike-slip otherwise, NGA-West2
    convention), used here for one classification throughout (common practice; Wells &
    Coppersmith classed events by their predominant slip component).  A NaN rake
    (unspecified mechanism) is taken as strike-slip, Wells & Coppersmith's default.
    """
    rake = np.asarray(rake_deg, dtype=np.float64)
    _, _, normal, reverse = mechanism_flags(rake)
    out = np.full(rake.shape, "strike_slip", dtype="<U11")
    out[reverse == 1.0] = "reverse"
    out[normal == 1.0] = "normal"
    return out


def wc94_dimensions(
    mag: ArrayLike,
    rake_deg: ArrayLike,
    *,
    max_width_km: ArrayLike = np.inf,
    min_aspect_ratio: float = 1.0,
    relation: str = "width",
    slip_type: str | None = None,
) -> tuple[FloatArray, FloatArray]:
    r"""Rupture length and width [km] from magnitude, after Wells & Coppersmith (1994).

    Parameters
    ----------
    mag : array_like [Mw]
    rake_deg : array_like [deg]
        Sets the slip type (:func:`slip_type_from_rake`) unless ``slip_type`` is given.
    max_width_km : array_like [km], optional
        Largest down-dip width, e.g. the seismogenic thickness / sin(dip). Default none.
    min_aspect_ratio : float, optional
        Smallest length / width, >= 0 (0 disables the cap). Default 1.
    relation : {"width", "length"}, optional
        Second relation used with the area one: "width" (RW on M, the length then
        A / W) or "length" (RLD on M, the width then A / L). Default "width".
    slip_type : {"strike_slip", "reverse", "normal", "all"}, optional
        Override of the slip type for all ruptures.

    Returns
    -------
    length_km, width_km : ndarray [km]
        Broadcast shape of the inputs.

    Notes
    -----
    1. Median area :math:`A = 10^{a + bM}` and width :math:`W_0 = 10^{a' + b'M}` (or
       length :math:`L_0`) from Table 2A (:data:`WC94_TABLE_2A`); the other dimension
       is :math:`A / W_0` (or :math:`A / L_0`).
    2. Aspect-ratio cap: if :math:`L < r W`, then :math:`W = \sqrt{A / r}`,
       :math:`L = r W` (area kept).
    3. Width limit: if :math:`W > W_{max}`, then :math:`W = W_{max}` and
       :math:`L = A / W_{max}`: the excess area goes to length (area kept; the aspect
       ratio only grows).

    References
    ----------
    Wells, D. L. & Coppersmith, K. J. (1994). New empirical relationships among
    magnitude, rupture length, rupture width, rupture area, and surface displacement.
    Bull. Seismol. Soc. Am. 84(4), 974-1002, Table 2A.
    """
    if relation not in ("width", "length"):
        raise ValueError(f"relation must be 'width' or 'length'; got {relation!r}")
    ratio = float(min_aspect_ratio)
    if not (math.isfinite(ratio) and ratio >= 0.0):
        raise ValueError(f"min_aspect_ratio must be finite and >= 0; got {min_aspect_ratio!r}")
    m, rake, wmax = np.broadcast_arrays(
        np.asarray(mag, dtype=np.float64), np.asarray(rake_deg, dtype=np.float64),
        np.asarray(max_width_km, dtype=np.float64),
    )
    if not np.all(np.isfinite(m)):
        raise ValueError("mag must be finite")
    if not np.all(wmax > 0.0):
        raise ValueError("max_width_km must be > 0")
    if slip_type is None:
        kinds = slip_type_from_rake(rake)
    elif slip_type in SLIP_TYPES:
        kinds = np.full(m.shape, slip_type)
    else:
        raise ValueError(f"slip_type must be one of {SLIP_TYPES} or None; got {slip_type!r}")
    log_area = np.empty(m.shape)
    log_second = np.empty(m.shape)
    for kind in SLIP_TYPES:
        sel = kinds == kind
        if np.any(sel):
            a, b = WC94_TABLE_2A["area"][kind]
            a2, b2 = WC94_TABLE_2A[relation][kind]
            log_area[sel] = a + b * m[sel]
            log_second[sel] = a2 + b2 * m[sel]
    area = 10.0 ** log_area
    if relation == "width":
        width = 10.0 ** log_second
        length = area / width
    else:
        length = 10.0 ** log_second
        width = area / length
    if ratio > 0.0:
        short = length < ratio * width
        width = np.where(short, np.sqrt(area / ratio), width)
        length = np.where(short, ratio * width, length)
    wide = width > wmax
    width = np.where(wide, wmax, width)
    length = np.where(wide, area / wmax, length)
    return length, width


# --------------------------------------------------------------------------- #
# corners
# --------------------------------------------------------------------------- #
def _corner_offsets(strike_deg, dip_deg, length_km, width_km, along_km, downdip_km):
    """(east, north, down) [km] of the four corners relative to a point of the plane, shape (n, 4, 3)."""
    th = np.radians(strike_deg)
    dl = np.radians(dip_deg)
    st, ct = np.sin(th), np.cos(th)
    cd = np.where(np.asarray(dip_deg) == 90.0, 0.0, np.cos(dl))
    sd = np.sin(dl)
    strike_vec = np.stack([st, ct, np.zeros_like(st)], axis=-1)  # (n, 3)
    dip_vec = np.stack([cd * ct, -cd * st, sd], axis=-1)  # toward strike + 90 deg, downward
    a = np.stack([np.zeros_like(length_km), length_km, length_km, np.zeros_like(length_km)], axis=-1)
    d = np.stack([np.zeros_like(width_km), np.zeros_like(width_km), width_km, width_km], axis=-1)
    a = a - along_km[..., None]
    d = d - downdip_km[..., None]
    return a[..., None] * strike_vec[:, None, :] + d[..., None] * dip_vec[:, None, :]


def rupture_corners(
    lon: ArrayLike,
    lat: ArrayLike,
    depth_km: ArrayLike,
    strike_deg: ArrayLike,
    dip_deg: ArrayLike,
    length_km: ArrayLike,
    width_km: ArrayLike,
    *,
    along_km: ArrayLike | None = None,
    downdip_km: ArrayLike | None = None,
) -> FloatArray:
    """Corners of rectangular ruptures through a given point of each plane.

    Parameters
    ----------
    lon, lat : array_like [deg]
        A point of the plane (by default its centre).
    depth_km : array_like [km]
        Depth of that point.
    strike_deg, dip_deg : array_like [deg]
        Strike (azimuth at the point) and dip in (0, 90], dipping to the right.
    length_km, width_km : array_like [km], > 0
    along_km, downdip_km : array_like [km], optional
        Where the point lies on the plane: distance along strike from the start edge and
        down dip from the top edge. Defaults ``length_km / 2`` and ``width_km / 2`` (the
        centre); ``downdip_km = 0`` makes the point the middle of the top edge.

    Returns
    -------
    ndarray, shape (n, 4, 3)
        (lon [deg], lat [deg], depth [km]) of top-start, top-end, bottom-end,
        bottom-start; ``n`` the broadcast size of the inputs.

    Raises
    ------
    ValueError
        If the plane would reach above the ground surface (top depth < 0) or a parameter
        is out of range.

    Notes
    -----
    The rectangle is built in the azimuthal equidistant projection about the given
    point (:func:`quakefolio.core.sources.geometry.aeqd_forward`), where the strike is the true
    azimuth at the point, and converted back to lon/lat.
    """
    arrays = np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (
        lon, lat, depth_km, strike_deg, dip_deg, length_km, width_km,
        0.5 * np.asarray(length_km, dtype=np.float64) if along_km is None else along_km,
        0.5 * np.asarray(width_km, dtype=np.float64) if downdip_km is None else downdip_km,
    )))
    lon, lat, depth, strike, dip, length, width, along, downdip = (a.reshape(-1) for a in arrays)
    if not np.all((dip > 0.0) & (dip <= 90.0)):
        raise ValueError("dip_deg must be in (0, 90]")
    if not (np.all(length > 0.0) and np.all(width > 0.0)):
        raise ValueError("length_km and width_km must be > 0")
    offsets = _corner_offsets(strike, dip, length, width, along, downdip)
    clon, clat = aeqd_inverse(offsets[..., 0], offsets[..., 1], lon[:, None], lat[:, None])
    cdepth = depth[:, None] + offsets[..., 2]
    return _finish_corners(clon, clat, cdepth)


def _finish_corners(clon, clat, cdepth):
    if np.any(cdepth < -1e-9):
        raise ValueError(
            f"rupture plane reaches above the ground surface (top depth {float(cdepth.min()):.6g} km)"
        )
    return np.stack([clon, clat, np.maximum(cdepth, 0.0)], axis=-1)


def _edge_azimuth(lon0, lat0, lon1, lat1) -> FloatArray:
    """Azimuth [deg, 0-360) of the segment point 0 -> point 1 at its midpoint."""
    v0 = np.stack(_unit_xyz(lon0, lat0), axis=-1)
    v1 = np.stack(_unit_xyz(lon1, lat1), axis=-1)
    mid = v0 + v1
    mid /= np.linalg.norm(mid, axis=-1, keepdims=True)
    mlon = np.degrees(np.arctan2(mid[..., 1], mid[..., 0]))
    mlat = np.degrees(np.arcsin(np.clip(mid[..., 2], -1.0, 1.0)))
    x0, y0 = aeqd_forward(lon0, lat0, mlon, mlat)
    x1, y1 = aeqd_forward(lon1, lat1, mlon, mlat)
    return _azimuth(np.degrees(np.arctan2(x1 - x0, y1 - y0)))


def _azimuth(deg):
    """Angle [deg] in [0, 360) (``x % 360`` can round to 360.0 for tiny negative x)."""
    out = np.mod(deg, 360.0)
    return np.where(out >= 360.0, 0.0, out)


def _unit_xyz(lon, lat):
    lo = np.radians(np.asarray(lon, dtype=np.float64))
    la = np.radians(np.asarray(lat, dtype=np.float64))
    return np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)


# --------------------------------------------------------------------------- #
# argument checks shared by the sources
# --------------------------------------------------------------------------- #
def _source_id(source_id) -> str:
    if not isinstance(source_id, str) or not source_id.strip():
        raise ValueError(f"source_id must be a non-empty string; got {source_id!r}")
    return source_id


def _layer(upper_depth_km, lower_depth_km) -> tuple[float, float]:
    usd, lsd = float(upper_depth_km), float(lower_depth_km)
    if not (math.isfinite(usd) and usd >= 0.0):
        raise ValueError(f"upper_depth_km must be finite and >= 0; got {upper_depth_km!r}")
    if not (math.isfinite(lsd) and lsd > usd):
        raise ValueError(f"lower_depth_km must be finite and > upper_depth_km ({usd:g}); got {lower_depth_km!r}")
    return usd, lsd


def _dip(name, value) -> float:
    d = float(value)
    if not 0.0 < d <= 90.0:
        raise ValueError(f"{name} must be in (0, 90]; got {value!r}")
    return d


def _rake(name, value) -> float:
    r = float(value)
    if not -180.0 <= r <= 180.0:
        raise ValueError(f"{name} must be in [-180, 180]; got {value!r}")
    return r


def _mfd(mfd) -> tuple[FloatArray, FloatArray]:
    try:
        mag, rate = mfd
    except (TypeError, ValueError) as exc:
        raise ValueError("mfd must be a MagnitudeBins (mag, rate) pair") from exc
    mag = np.asarray(mag, dtype=np.float64).reshape(-1)
    rate = np.asarray(rate, dtype=np.float64).reshape(-1)
    if mag.shape != rate.shape or mag.size == 0:
        raise ValueError("mfd: mag and rate must have equal non-zero length")
    if not (np.all(np.isfinite(mag)) and np.all(np.isfinite(rate)) and np.all(rate >= 0.0)):
        raise ValueError("mfd: magnitudes must be finite and rates finite and >= 0")
    return mag, rate


def _weights(name: str, items, width: int) -> np.ndarray:
    try:
        arr = np.array([tuple(float(v) for v in item) for item in items], dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a list of {width}-tuples of numbers") from exc
    if arr.ndim != 2 or arr.shape[1] != width or arr.shape[0] == 0:
        raise ValueError(f"{name} must be a non-empty list of {width}-tuples; got {items!r}")
    w = arr[:, -1]
    if not (np.all(np.isfinite(arr)) and np.all(w > 0.0)):
        raise ValueError(f"{name}: values must be finite and weights > 0")
    if abs(w.sum() - 1.0) > 1e-6:
        raise ValueError(f"{name}: weights must sum to 1; they sum to {w.sum():.9g}")
    arr[:, -1] = w / w.sum()
    return arr


def _step(rupture_step_km) -> float:
    step = float(rupture_step_km)
    if not (math.isfinite(step) and step > 0.0):
        raise ValueError(f"rupture_step_km must be > 0; got {rupture_step_km!r}")
    return step


class FaultFrame(NamedTuple):
    """The plane of a planar fault in its local projection (see :func:`fault_frame`)."""

    ref_lon: float  #: projection centre [deg]
    ref_lat: float  #: [deg]
    x_km: FloatArray  #: east of the trace points [km] (a bent trace: every point kept)
    y_km: FloatArray  #: north of the trace points [km]
    length_km: float  #: fault length along the trace [km]
    width_km: float  #: fault width down dip [km]
    strike_deg: float  #: strike of the trace, first to last point [deg]


def fault_frame(source_id, trace, dip_deg, upper_depth_km, lower_depth_km) -> FaultFrame:
    r"""Length, width and strike of a fault: planar (two trace points) or bent (more).

    Parameters
    ----------
    source_id : str
        Named in errors.
    trace : sequence of (lon, lat) [deg]
        At least two points, in order along the fault.
    dip_deg : float [deg]
        Dip in (0, 90].
    upper_depth_km, lower_depth_km : float [km]
        Seismogenic depths, ``0 <= upper < lower``.

    Returns
    -------
    FaultFrame
        Two points: :math:`L_f` the distance between them in the azimuthal equidistant
        projection about their mean position. More points: the projection about the mean
        position of all of them, points repeating the one before (segments shorter than
        :data:`MIN_SEGMENT_KM`) dropped, :math:`L_f` the summed length of the segments, the
        strike that of the first -> last point. Always
        :math:`W_f = (z_{low} - z_{up}) / \sin\delta`.
    """
    pts = np.asarray(trace, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != 2 or pts.shape[0] < 2 or not np.all(np.isfinite(pts)):
        raise ValueError(f"fault {source_id!r}: trace must be a list of at least two (lon, lat) points")
    width = (lower_depth_km - upper_depth_km) / math.sin(math.radians(dip_deg))
    if pts.shape[0] > 2:
        return _bent_frame(source_id, pts, width)
    ref_lon, ref_lat = mean_position(pts[[0, -1], 0], pts[[0, -1], 1])
    xs, ys = aeqd_forward(pts[[0, -1], 0], pts[[0, -1], 1], ref_lon, ref_lat)
    length = float(np.hypot(xs[1] - xs[0], ys[1] - ys[0]))
    if length < 1e-3:
        raise ValueError(f"fault {source_id!r}: first and last trace points coincide")
    strike = float(_azimuth(math.degrees(math.atan2(xs[1] - xs[0], ys[1] - ys[0]))))
    return FaultFrame(ref_lon, ref_lat, xs, ys, length, width, strike)


#: Shortest segment of a bent fault trace [km]: a point closer than this to the one before
#: repeats it and is dropped.
MIN_SEGMENT_KM = 1e-6


def _bent_frame(source_id, pts, width) -> FaultFrame:
    ref_lon, ref_lat = mean_position(pts[:, 0], pts[:, 1])
    xs, ys = aeqd_forward(pts[:, 0], pts[:, 1], ref_lon, ref_lat)
    keep = np.concatenate([[True], np.hypot(np.diff(xs), np.diff(ys)) >= MIN_SEGMENT_KM])
    xs, ys = np.asarray(xs)[keep], np.asarray(ys)[keep]
    length = float(np.sum(np.hypot(np.diff(xs), np.diff(ys))))
    if xs.size < 2 or length < 1e-3:
        raise ValueError(f"fault {source_id!r}: the trace points coincide")
    strike = float(_azimuth(math.degrees(math.atan2(xs[-1] - xs[0], ys[-1] - ys[0]))))
    return FaultFrame(ref_lon, ref_lat, xs, ys, length, width, strike)


def fault_rupture_dimensions(frame, mags, rake_deg, *, min_aspect_ratio=1.0, relation="width", slip_type=None):
    """Length and width [km] of each magnitude's rupture on a fault (planar or bent).

    :func:`wc94_dimensions` with the width limited to the fault width (excess area to
    length), then the length clipped to the fault length (see :func:`planar_fault_ruptures`).

    Parameters
    ----------
    frame : FaultFrame
    mags : ndarray [Mw]
    rake_deg : float [deg]
    min_aspect_ratio, relation, slip_type
        Passed to :func:`wc94_dimensions`.

    Returns
    -------
    lengths_km, widths_km : ndarray [km], shape of ``mags``
    """
    lengths, widths = wc94_dimensions(mags, rake_deg, max_width_km=frame.width_km, min_aspect_ratio=min_aspect_ratio,
                                      relation=relation, slip_type=slip_type)
    return np.minimum(lengths, frame.length_km), np.minimum(widths, frame.width_km)


def _floating_offsets(room_km: float, step_km: float) -> FloatArray:
    """Evenly spaced offsets from 0 to ``room_km`` with spacing at most ``step_km``."""
    if room_km <= 1e-9:
        return np.zeros(1)
    n = int(math.ceil(room_km / step_km - 1e-9)) + 1
    return np.linspace(0.0, room_km, n)


# --------------------------------------------------------------------------- #
# planar fault
# --------------------------------------------------------------------------- #
def planar_fault_ruptures(
    source_id: str,
    trace: Sequence[Sequence[float]],
    *,
    dip_deg: float,
    upper_depth_km: float,
    lower_depth_km: float,
    rake_deg: float,
    mfd: MagnitudeBins,
    rupture_step_km: float = 2.0,
    min_aspect_ratio: float = 1.0,
    relation: str = "width",
    slip_type: str | None = None,
) -> RuptureSet:
    r"""Floating ruptures on a planar fault.

    Parameters
    ----------
    source_id : str
    trace : sequence of (lon, lat) [deg]
        Fault trace, at least two points; only the first and last are used (below; a bent
        fault is :func:`quakefolio.core.sources.faults.fault_ruptures`).
    dip_deg : float [deg]
        Dip in (0, 90], to the right of the direction first -> last trace point.
    upper_depth_km, lower_depth_km : float [km]
        Seismogenic depths bounding the fault plane, ``0 <= upper < lower``.
    rake_deg : float [deg]
        Rake in [-180, 180]; also sets the Wells & Coppersmith slip type.
    mfd : MagnitudeBins
        Magnitudes [Mw] and annual rates [1/yr] of the fault.
    rupture_step_km : float [km], optional
        Largest spacing of rupture positions along strike and down dip. Default 2 km.
    min_aspect_ratio, relation, slip_type
        Passed to :func:`wc94_dimensions`.

    Returns
    -------
    RuptureSet
        One source; ruptures ordered by magnitude bin, then down-dip, then along-strike
        position.

    Notes
    -----
    *Geometry.* The fault plane is planar: its trace is the great-circle segment from
    the first to the last trace point (intermediate points are ignored). The trace is
    where the plane, extended upward, meets the ground surface, so the top edge of the
    fault, at ``upper_depth_km``, lies ``upper_depth_km / tan(dip)`` from the trace in the
    dip direction. Fault length :math:`L_f` is the trace length, fault width
    :math:`W_f = (z_{low} - z_{up}) / \sin\delta`. The plane is built in the azimuthal
    equidistant projection about the trace midpoint, where the trace is a straight line.

    *Dimensions and clipping.* Each magnitude's rupture has the
    :func:`wc94_dimensions` length and width with the width limited to :math:`W_f`
    (excess area to length); a rupture longer than the fault is clipped to
    :math:`L_f` (the rupture then has less area than the scaling relation gives; its
    rate is unchanged).

    *Floating.* Ruptures of one magnitude are placed at ``n_along x n_down`` positions:
    top-start corners evenly spaced from one end of the fault to the other
    (``n = ceil(room / rupture_step_km) + 1`` positions over the ``room`` left by the
    rupture, so the spacing is at most the step and both ends are reached), likewise
    down dip. The bin rate is split equally among the positions (uniform probability of
    location on the fault; common practice).

    *Per-rupture values.* ``strike_deg`` is the azimuth of each rupture's top edge at
    its midpoint; ``zhyp_km`` the depth of the centre of the rupture plane.
    """
    sid = _source_id(source_id)
    dip = _dip("dip_deg", dip_deg)
    rake = _rake("rake_deg", rake_deg)
    usd, lsd = _layer(upper_depth_km, lower_depth_km)
    mags, rates = _mfd(mfd)
    step = _step(rupture_step_km)
    ends = np.asarray(trace, dtype=np.float64)
    frame = fault_frame(sid, ends[[0, -1]] if ends.ndim == 2 and ends.shape[0] > 2 else trace, dip, usd, lsd)
    ref_lon, ref_lat, xs, ys = frame.ref_lon, frame.ref_lat, frame.x_km, frame.y_km
    fault_length, fault_width, strike = frame.length_km, frame.width_km, frame.strike_deg
    th, dl = math.radians(strike), math.radians(dip)
    sind = math.sin(dl)
    cosd = 0.0 if dip == 90.0 else math.cos(dl)
    s_vec = np.array([math.sin(th), math.cos(th), 0.0])
    d_vec = np.array([cosd * math.cos(th), -cosd * math.sin(th), sind])
    # top-start corner of the fault plane: trace start moved down dip to the upper depth
    origin = np.array([xs[0], ys[0], 0.0]) + (usd / sind) * d_vec
    lengths, widths = fault_rupture_dimensions(frame, mags, rake, min_aspect_ratio=min_aspect_ratio,
                                               relation=relation, slip_type=slip_type)

    cols = {name: [] for name in ("mag", "rate", "ztor_km", "width_km", "length_km")}
    xyz = []
    for m, r, length, width in zip(mags, rates, lengths, widths):
        along = _floating_offsets(fault_length - length, step)
        down = _floating_offsets(fault_width - width, step)
        dd, aa = np.meshgrid(down, along, indexing="ij")
        aa, dd = aa.ravel(), dd.ravel()
        n = aa.size
        top_start = origin + aa[:, None] * s_vec + dd[:, None] * d_vec  # (n, 3)
        offsets = _corner_offsets(
            np.full(n, strike), np.full(n, dip), np.full(n, length), np.full(n, width), np.zeros(n), np.zeros(n)
        )
        xyz.append(top_start[:, None, :] + offsets)
        cols["mag"].append(np.full(n, m))
        cols["rate"].append(np.full(n, r / n))
        cols["ztor_km"].append(usd + dd * sind)
        cols["width_km"].append(np.full(n, width))
        cols["length_km"].append(np.full(n, length))
    xyz = np.concatenate(xyz)
    col = {k: np.concatenate(v) for k, v in cols.items()}
    clon, clat = aeqd_inverse(xyz[..., 0], xyz[..., 1], ref_lon, ref_lat)
    corners = _finish_corners(clon, clat, xyz[..., 2])
    n = col["mag"].size
    vertical = col["width_km"] * sind
    return RuptureSet(
        source_index=np.zeros(n, dtype=np.int64),
        source_ids=(sid,),
        mag=col["mag"],
        rate=col["rate"],
        strike_deg=_edge_azimuth(corners[:, 0, 0], corners[:, 0, 1], corners[:, 1, 0], corners[:, 1, 1]),
        dip_deg=np.full(n, dip),
        rake_deg=np.full(n, rake),
        ztor_km=col["ztor_km"],
        zbot_km=col["ztor_km"] + vertical,
        width_km=col["width_km"],
        length_km=col["length_km"],
        zhyp_km=col["ztor_km"] + 0.5 * vertical,
        corners=corners,
    )


# --------------------------------------------------------------------------- #
# point and area sources
# --------------------------------------------------------------------------- #
def _point_ruptures(
    sid: str,
    lons: FloatArray,
    lats: FloatArray,
    share: float,
    *,
    mfd,
    hypo_depths,
    mechanisms,
    upper_depth_km,
    lower_depth_km,
    min_aspect_ratio,
    relation,
    slip_type,
) -> RuptureSet:
    """Point-source ruptures at every (lon, lat), each location carrying ``share`` of the MFD rate."""
    usd, lsd = _layer(upper_depth_km, lower_depth_km)
    mags, rates = _mfd(mfd)
    depths = _weights("hypo_depths", hypo_depths, 2)
    mechs = _weights("mechanisms", mechanisms, 4)
    if np.any((depths[:, 0] < usd) | (depths[:, 0] > lsd)):
        raise ValueError(
            f"source {sid!r}: hypocentral depths must lie in [upper_depth_km, lower_depth_km] = [{usd:g}, {lsd:g}]"
        )
    for strike, dip, rake, _ in mechs:
        _dip("mechanism dip", dip)
        _rake("mechanism rake", rake)
    n_loc = lons.size
    parts = {name: [] for name in ("mag", "rate", "strike_deg", "dip_deg", "rake_deg", "ztor_km",
                                   "width_km", "length_km", "zhyp_km", "along", "downdip", "anchor_depth")}
    for strike, dip, rake, w_mech in mechs:
        sind = math.sin(math.radians(dip))
        lengths, widths = wc94_dimensions(
            mags, rake, max_width_km=(lsd - usd) / sind, min_aspect_ratio=min_aspect_ratio,
            relation=relation, slip_type=slip_type,
        )
        for m, r, length, width in zip(mags, rates, lengths, widths):
            half = 0.5 * width * sind
            for zh, w_depth in depths:
                lo, hi = usd + half, lsd - half
                zc = min(max(zh, lo), max(hi, lo))  # plane centre depth, inside the layer
                downdip = 0.5 * width + (zh - zc) / sind  # hypocentre position on the plane
                values = {
                    "mag": m, "rate": r * w_mech * w_depth * share, "strike_deg": float(_azimuth(strike)),
                    "dip_deg": dip, "rake_deg": rake, "ztor_km": zc - half, "width_km": width,
                    "length_km": length, "zhyp_km": zh, "along": 0.5 * length, "downdip": downdip,
                    "anchor_depth": zh,
                }
                for name, value in values.items():
                    parts[name].append(value)
    n_cfg = len(parts["mag"])
    cfg = {name: np.asarray(v, dtype=np.float64) for name, v in parts.items()}
    # one row per (configuration, location), configurations outermost
    rep = {name: np.repeat(v, n_loc) for name, v in cfg.items()}
    loc_lon = np.tile(lons, n_cfg)
    loc_lat = np.tile(lats, n_cfg)
    offsets = _corner_offsets(cfg["strike_deg"], cfg["dip_deg"], cfg["length_km"], cfg["width_km"],
                              cfg["along"], cfg["downdip"])  # (n_cfg, 4, 3)
    offsets = np.repeat(offsets, n_loc, axis=0)
    clon, clat = aeqd_inverse(offsets[..., 0], offsets[..., 1], loc_lon[:, None], loc_lat[:, None])
    corners = _finish_corners(clon, clat, rep["anchor_depth"][:, None] + offsets[..., 2])
    # top and bottom depths from the corners themselves so the two agree to round-off
    ztor = corners[:, 0, 2]
    n = ztor.size
    return RuptureSet(
        source_index=np.zeros(n, dtype=np.int64),
        source_ids=(sid,),
        mag=rep["mag"],
        rate=rep["rate"],
        strike_deg=rep["strike_deg"],
        dip_deg=rep["dip_deg"],
        rake_deg=rep["rake_deg"],
        ztor_km=ztor,
        zbot_km=corners[:, 2, 2],
        width_km=rep["width_km"],
        length_km=rep["length_km"],
        zhyp_km=rep["zhyp_km"],
        corners=corners,
    )


def point_source_ruptures(
    source_id: str,
    lon: float,
    lat: float,
    *,
    mfd: MagnitudeBins,
    hypo_depths: Sequence[tuple[float, float]],
    mechanisms: Sequence[tuple[float, float, float, float]],
    upper_depth_km: float,
    lower_depth_km: float,
    min_aspect_ratio: float = 1.0,
    relation: str = "width",
    slip_type: str | None = None,
) -> RuptureSet:
    r"""Finite ruptures of a point source.

    Parameters
    ----------
    source_id : str
    lon, lat : float [deg]
        Epicentre.
    mfd : MagnitudeBins
        Magnitudes [Mw] and annual rates [1/yr].
    hypo_depths : sequence of (depth_km, weight)
        Hypocentral depth distribution [km]; depths within the seismogenic layer,
        weights > 0 summing to 1.
    mechanisms : sequence of (strike_deg, dip_deg, rake_deg, weight)
        Mechanism distribution [deg]; weights > 0 summing to 1.
    upper_depth_km, lower_depth_km : float [km]
        Seismogenic layer.
    min_aspect_ratio, relation, slip_type
        Passed to :func:`wc94_dimensions`; the width is limited to
        ``(lower - upper) / sin(dip)``.

    Returns
    -------
    RuptureSet
        One rupture per (mechanism, magnitude, depth), rate
        ``rate(m) * w_mechanism * w_depth``.

    Notes
    -----
    Each rupture is a rectangle (:func:`wc94_dimensions`) whose centre lies at the
    hypocentre (epicentre at the hypocentral depth). Where that plane would cross the
    top or bottom of the seismogenic layer it is slid along its own dip direction until
    it fits, so the hypocentre stays on the plane (then no longer at its centre) and the
    plane spans at most the layer. ``zhyp_km`` is the given hypocentral depth.
    """
    sid = _source_id(source_id)
    lon_arr = np.atleast_1d(np.asarray(lon, dtype=np.float64))
    lat_arr = np.atleast_1d(np.asarray(lat, dtype=np.float64))
    if lon_arr.shape != (1,) or lat_arr.shape != (1,) or not np.all(np.isfinite([lon_arr, lat_arr])):
        raise ValueError(f"source {sid!r}: lon and lat must be finite scalars")
    if abs(lat_arr[0]) > 90.0:
        raise ValueError(f"source {sid!r}: lat must be in [-90, 90]; got {lat!r}")
    return _point_ruptures(
        sid, lon_arr, lat_arr, 1.0, mfd=mfd, hypo_depths=hypo_depths, mechanisms=mechanisms,
        upper_depth_km=upper_depth_km, lower_depth_km=lower_depth_km,
        min_aspect_ratio=min_aspect_ratio, relation=relation, slip_type=slip_type,
    )


def polygon_grid(polygon: Sequence[Sequence[float]], spacing_km: float) -> tuple[FloatArray, FloatArray]:
    """Grid points [deg] inside a polygon at a given spacing [km].

    Parameters
    ----------
    polygon : sequence of (lon, lat) [deg]
        At least three vertices, in either order; a closing vertex equal to the first
        is dropped.
    spacing_km : float [km], > 0

    Returns
    -------
    lon, lat : ndarray [deg], shape (n_points,)

    Raises
    ------
    ValueError
        If no grid point falls inside (the polygon is small for the spacing).

    Notes
    -----
    The polygon is projected with the azimuthal equidistant projection about the mean
    of its vertices (:mod:`quakefolio.core.sources.geometry`); there its edges are straight
    lines (for a regional polygon the departure from great circles is negligible), a
    square grid of the given spacing centred on the polygon's bounding box is laid over
    it, and points inside are kept by ray casting
    (:func:`quakefolio.core.sources.geometry.points_in_polygon`).
    """
    frame = polygon_frame(polygon, spacing_km)
    gx, gy = np.meshgrid(frame.axis(0), frame.axis(1), indexing="xy")
    gx, gy = gx.ravel(), gy.ravel()
    inside = points_in_polygon(gx, gy, frame.vx, frame.vy)
    if not np.any(inside):
        raise ValueError(f"no grid point at spacing {frame.step_km:g} km falls inside the polygon; "
                         "use a smaller spacing_km")
    return aeqd_inverse(gx[inside], gy[inside], frame.ref_lon, frame.ref_lat)


class PolygonFrame(NamedTuple):
    """A polygon in its local projection and the square grid laid over it (see :func:`polygon_grid`)."""

    ref_lon: float  #: projection centre [deg]
    ref_lat: float  #: [deg]
    vx: FloatArray  #: vertices east [km]
    vy: FloatArray  #: vertices north [km]
    step_km: float  #: grid spacing [km]
    n: tuple  #: grid points along x and y (the bounding box holds n[0] * n[1])

    def axis(self, k: int) -> FloatArray:
        """Grid coordinates [km] along x (``k = 0``) or y (``k = 1``), centred on the bounding box."""
        v = self.vx if k == 0 else self.vy
        lo, hi, n = v.min(), v.max(), self.n[k]
        return 0.5 * (lo + hi) + self.step_km * (np.arange(n) - 0.5 * (n - 1))


def polygon_frame(polygon, spacing_km) -> PolygonFrame:
    """Projected vertices and grid size of :func:`polygon_grid` (no grid point built).

    Parameters
    ----------
    polygon : sequence of (lon, lat) [deg]
    spacing_km : float [km], > 0

    Returns
    -------
    PolygonFrame
    """
    pts = np.asarray(polygon, dtype=np.float64)
    if pts.ndim != 2 or pts.shape[1] != 2 or not np.all(np.isfinite(pts)):
        raise ValueError("polygon must be a list of (lon, lat) vertices")
    if pts.shape[0] > 3 and np.allclose(pts[0], pts[-1]):
        pts = pts[:-1]
    if pts.shape[0] < 3:
        raise ValueError(f"polygon needs at least 3 distinct vertices; got {pts.shape[0]}")
    step = float(spacing_km)
    if not (math.isfinite(step) and step > 0.0):
        raise ValueError(f"spacing_km must be > 0; got {spacing_km!r}")
    ref_lon, ref_lat = mean_position(pts[:, 0], pts[:, 1])
    vx, vy = aeqd_forward(pts[:, 0], pts[:, 1], ref_lon, ref_lat)
    n = tuple(int(math.floor((v.max() - v.min()) / step + 1e-9)) + 1 for v in (vx, vy))
    return PolygonFrame(ref_lon, ref_lat, np.asarray(vx), np.asarray(vy), step, n)


def area_source_ruptures(
    source_id: str,
    polygon: Sequence[Sequence[float]],
    *,
    spacing_km: float,
    mfd: MagnitudeBins,
    hypo_depths: Sequence[tuple[float, float]],
    mechanisms: Sequence[tuple[float, float, float, float]],
    upper_depth_km: float,
    lower_depth_km: float,
    min_aspect_ratio: float = 1.0,
    relation: str = "width",
    slip_type: str | None = None,
) -> RuptureSet:
    """Ruptures of an area source: a polygon gridded into equal point sources.

    Parameters
    ----------
    source_id : str
    polygon : sequence of (lon, lat) [deg]
        Source outline (see :func:`polygon_grid`).
    spacing_km : float [km]
        Grid spacing.
    mfd, hypo_depths, mechanisms, upper_depth_km, lower_depth_km, min_aspect_ratio, relation, slip_type
        As in :func:`point_source_ruptures`; ``mfd`` is the rate of the whole source.

    Returns
    -------
    RuptureSet
        One source. Each of the ``n_points`` grid points is a point source with
        ``1 / n_points`` of every bin rate (uniform seismicity over the area, common
        practice), so the rupture rates sum to the MFD's total.
    """
    sid = _source_id(source_id)
    lons, lats = polygon_grid(polygon, spacing_km)
    return _point_ruptures(
        sid, lons, lats, 1.0 / lons.size, mfd=mfd, hypo_depths=hypo_depths, mechanisms=mechanisms,
        upper_depth_km=upper_depth_km, lower_depth_km=lower_depth_km,
        min_aspect_ratio=min_aspect_ratio, relation=relation, slip_type=slip_type,
    )


def fault_plane_area_km2(trace, dip_deg, upper_depth_km, lower_depth_km):
    r"""Area [km^2] of the planar fault used by :func:`planar_fault_ruptures`.

    :math:`A = L\,(z_{low} - z_{up})/\sin\delta` with :math:`L` the great-circle length
    [km] of the trace (two points: between them; more: summed over its segments, the fault
    of :func:`quakefolio.core.sources.faults.fault_ruptures`) and :math:`\delta` the dip.
    """
    from quakefolio.core.geo import great_circle_km

    pts = np.asarray(trace, dtype=float)
    if pts.ndim != 2 or pts.shape[0] < 2 or pts.shape[1] != 2:
        raise ValueError(f"trace must be at least two (lon, lat) points, got shape {pts.shape}")
    if pts.shape[0] == 2:
        length = float(great_circle_km(pts[0, 0], pts[0, 1], pts[-1, 0], pts[-1, 1]))
    else:
        length = float(np.sum(great_circle_km(pts[:-1, 0], pts[:-1, 1], pts[1:, 0], pts[1:, 1])))
    top, bottom = _layer(upper_depth_km, lower_depth_km)
    return length * (bottom - top) / math.sin(math.radians(_dip("dip_deg", dip_deg)))
