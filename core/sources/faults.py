r"""Faults whose trace has any number of points, and how each magnitude's rupture fits its fault.

:func:`fault_ruptures` builds the floating ruptures of a fault: a two-point trace is the planar
fault of :func:`quakefolio.core.sources.ruptures.planar_fault_ruptures` (unchanged); a longer
trace is a bent fault, built here.

Bent fault
----------
A trace of :math:`n + 1` points, in order along the fault, makes :math:`n` segments. Each
segment is the trace of a plane that dips at the fault's one dip to the right of the segment's
direction (the convention of the planar fault, Aki & Richards 2002, applied segment by segment),
between the upper and the lower seismogenic depth: a rectangle :math:`\ell_i` long and
:math:`W_f = (z_{low} - z_{up}) / \sin\delta` wide, its top edge :math:`z_{up}\cot\delta` from
the trace in its own dip direction. The fault is the union of these rectangles, with coordinates
:math:`a \in [0, L_f]` along the trace (:math:`L_f = \sum_i \ell_i`) and :math:`d \in [0, W_f]`
down dip. Where the trace bends by an angle :math:`\theta`, neighbouring rectangles meet on the
trace (their common upward extension); below it they overlap on the inside of the bend and leave
a wedge on the outside, their top edges at depth :math:`z` lying
:math:`2 z \cot\delta \sin(\theta / 2)` apart (our construction: every piece of the fault is a
rectangle of its segment's plane, so distances to it stay exact).

Ruptures float along the whole trace, across the joints: a rupture of length :math:`L` and
width :math:`W` at offsets :math:`(a, d)` is the part :math:`[a, a + L] \times [d, d + W]` of the
fault; on each segment it spans, its piece is the rectangle of that segment's plane over the
part of :math:`[a, a + L]` within the segment. Rupture length is measured along the trace. A
rupture within one segment is one rectangle, as on a planar fault; one that spans several is
stored with its pieces (:class:`~quakefolio.core.sources.ruptures.RuptureSet`), and its
distances are those of the union (:mod:`quakefolio.core.sources.planes`).

Ruptures larger than the fault
------------------------------
Each magnitude's rupture has the dimensions of
:func:`~quakefolio.core.sources.ruptures.fault_rupture_dimensions`: the Wells & Coppersmith
(1994) length and width, the width limited to :math:`W_f` (excess area to length), then the
length capped at :math:`L_f`; the magnitude keeps its rate. A rupture capped in length has less
area than the scaling relation gives; :func:`rupture_fit` names those magnitudes, and those
whose scaling area alone exceeds the fault's, for the warning and the moment-balance report of
the source-model reader.
"""
from __future__ import annotations

import math
from typing import NamedTuple, Sequence

import numpy as np
from numpy.typing import NDArray

from quakefolio.core.sources.geometry import aeqd_inverse
from quakefolio.core.sources.mfd import MagnitudeBins
from quakefolio.core.sources.ruptures import (
    FaultFrame, RuptureSet, _dip, _edge_azimuth, _finish_corners, _floating_offsets, _layer, _mfd, _rake, _source_id,
    _step, fault_frame, fault_rupture_dimensions, planar_fault_ruptures, wc94_dimensions,
)

__all__ = ["fault_ruptures", "RuptureFit", "rupture_fit", "PIECE_MIN_KM"]

FloatArray = NDArray[np.float64]

#: A rupture's part of a segment shorter than this [km] (it ends at a joint within round-off)
#: makes no piece.
PIECE_MIN_KM = 1e-6


def fault_ruptures(
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
    r"""Floating ruptures of a fault with a trace of two or more points.

    Parameters
    ----------
    source_id : str
    trace : sequence of (lon, lat) [deg]
        Fault trace in order along the fault, at least two points; the fault dips to the right
        of each segment's direction. Two points: the planar fault of
        :func:`~quakefolio.core.sources.ruptures.planar_fault_ruptures`. More: a bent fault
        (module notes); points repeating the one before are dropped. Whether the trace crosses
        itself is the caller's check
        (:func:`~quakefolio.core.sources.geometry.polyline_self_crossing`).
    dip_deg : float [deg]
        Dip in (0, 90], the same on every segment.
    upper_depth_km, lower_depth_km : float [km]
        Seismogenic depths, ``0 <= upper < lower``.
    rake_deg : float [deg]
        Rake in [-180, 180]; also sets the Wells & Coppersmith slip type.
    mfd : MagnitudeBins
        Magnitudes [Mw] and annual rates [1/yr] of the fault.
    rupture_step_km : float [km], optional
        Largest spacing of rupture positions along the trace and down dip. Default 2 km.
    min_aspect_ratio, relation, slip_type
        Passed to :func:`~quakefolio.core.sources.ruptures.wc94_dimensions`.

    Returns
    -------
    RuptureSet
        One source; ruptures ordered by magnitude bin, then down-dip, then along-trace position,
        each bin's rate split equally among its positions. On a bent fault ``length_km`` is the
        length along the trace and ``strike_deg`` the azimuth from the start to the end of the
        rupture's top edge (its own segment's azimuth for a rupture on one segment).

    Notes
    -----
    Positions as on the planar fault: ``n = ceil(room / rupture_step_km) + 1`` offsets evenly
    spread over the room the rupture leaves along the trace (:math:`L_f - L`) and down dip
    (:math:`W_f - W`), so both ends are reached; the bin rate is split equally among them
    (uniform probability of location on the fault; common practice).
    """
    pts = np.asarray(trace, dtype=np.float64)
    kw = dict(dip_deg=dip_deg, upper_depth_km=upper_depth_km, lower_depth_km=lower_depth_km, rake_deg=rake_deg,
              mfd=mfd, rupture_step_km=rupture_step_km, min_aspect_ratio=min_aspect_ratio, relation=relation,
              slip_type=slip_type)
    if pts.ndim != 2 or pts.shape[0] <= 2:
        return planar_fault_ruptures(source_id, trace, **kw)
    return _bent_fault_ruptures(_source_id(source_id), pts, **kw)


class _Segments(NamedTuple):
    """A bent fault's segments in its projection."""

    start_km: FloatArray  # along-trace position of each segment's start [km]
    length_km: FloatArray  # segment lengths [km]
    origin: FloatArray  # (n_seg, 3) top-start corner of each segment's plane (east, north, down) [km]
    strike: FloatArray  # (n_seg, 3) unit vectors along each segment
    down_dip: FloatArray  # (n_seg, 3) unit vectors down dip, to the right of each segment


def _segments(frame: FaultFrame, dip: float, upper: float) -> _Segments:
    dx, dy = np.diff(frame.x_km), np.diff(frame.y_km)
    seg = np.hypot(dx, dy)
    ux, uy = dx / seg, dy / seg
    sind = math.sin(math.radians(dip))
    cosd = 0.0 if dip == 90.0 else math.cos(math.radians(dip))
    zero = np.zeros_like(ux)
    strike = np.stack([ux, uy, zero], axis=-1)
    down = np.stack([cosd * uy, -cosd * ux, np.full_like(ux, sind)], axis=-1)  # toward strike + 90 deg
    trace = np.stack([frame.x_km[:-1], frame.y_km[:-1], zero], axis=-1)
    origin = trace + (upper / sind) * down
    return _Segments(np.concatenate([[0.0], np.cumsum(seg)[:-1]]), seg, origin, strike, down)


def _place(seg: _Segments, along: FloatArray, down: FloatArray, length: float, width: float):
    """Corners (n, 4, 3) of ruptures at offsets (``along``, ``down``) [km], the pieces (m, 4, 3) of
    those spanning several segments and the rupture of each piece (local index)."""
    b0 = np.clip(along[:, None] - seg.start_km, 0.0, seg.length_km)
    b1 = np.clip(along[:, None] + length - seg.start_km, 0.0, seg.length_km)
    has = (b1 - b0) > PIECE_MIN_KM
    count = has.sum(axis=1)
    if np.any(count == 0):
        raise ValueError("a rupture lies on no segment of the fault")
    pos, k = np.nonzero(has)  # pieces in order: by rupture, then along the trace
    top0 = seg.origin[k] + b0[pos, k, None] * seg.strike[k] + down[pos, None] * seg.down_dip[k]
    top1 = top0 + (b1 - b0)[pos, k, None] * seg.strike[k]
    dvec = width * seg.down_dip[k]
    pieces = np.stack([top0, top1, top1 + dvec, top0 + dvec], axis=1)
    last = np.cumsum(count) - 1
    first = last - count + 1
    corners = np.stack([pieces[first, 0], pieces[last, 1], pieces[last, 2], pieces[first, 3]], axis=1)
    multi = count[pos] > 1
    return corners, pieces[multi], pos[multi]


def _bent_fault_ruptures(sid, pts, *, dip_deg, upper_depth_km, lower_depth_km, rake_deg, mfd, rupture_step_km,
                         min_aspect_ratio, relation, slip_type) -> RuptureSet:
    dip = _dip("dip_deg", dip_deg)
    rake = _rake("rake_deg", rake_deg)
    usd, lsd = _layer(upper_depth_km, lower_depth_km)
    mags, rates = _mfd(mfd)
    step = _step(rupture_step_km)
    frame = fault_frame(sid, pts, dip, usd, lsd)
    seg = _segments(frame, dip, usd)
    sind = math.sin(math.radians(dip))
    lengths, widths = fault_rupture_dimensions(frame, mags, rake, min_aspect_ratio=min_aspect_ratio,
                                               relation=relation, slip_type=slip_type)
    cols = {name: [] for name in ("mag", "rate", "ztor_km", "width_km", "length_km")}
    corners, pieces, owners, done = [], [], [], 0
    for m, r, length, width in zip(mags, rates, lengths, widths):
        dd, aa = np.meshgrid(_floating_offsets(frame.width_km - width, step),
                             _floating_offsets(frame.length_km - length, step), indexing="ij")
        aa, dd = aa.ravel(), dd.ravel()
        c, p, owner = _place(seg, aa, dd, length, width)
        corners.append(c)
        pieces.append(p)
        owners.append(owner + done)
        n = aa.size
        done += n
        for name, value in (("mag", m), ("rate", r / n), ("width_km", width), ("length_km", length)):
            cols[name].append(np.full(n, value))
        cols["ztor_km"].append(usd + dd * sind)
    col = {k: np.concatenate(v) for k, v in cols.items()}
    xyz, pxyz = np.concatenate(corners), np.concatenate(pieces)
    corners = _finish_corners(*aeqd_inverse(xyz[..., 0], xyz[..., 1], frame.ref_lon, frame.ref_lat), xyz[..., 2])
    piece_corners = _finish_corners(*aeqd_inverse(pxyz[..., 0], pxyz[..., 1], frame.ref_lon, frame.ref_lat),
                                    pxyz[..., 2])
    n = col["mag"].size
    vertical = col["width_km"] * sind
    return RuptureSet(
        source_index=np.zeros(n, dtype=np.int64), source_ids=(sid,), mag=col["mag"], rate=col["rate"],
        strike_deg=_edge_azimuth(corners[:, 0, 0], corners[:, 0, 1], corners[:, 1, 0], corners[:, 1, 1]),
        dip_deg=np.full(n, dip), rake_deg=np.full(n, rake), ztor_km=col["ztor_km"],
        zbot_km=col["ztor_km"] + vertical, width_km=col["width_km"], length_km=col["length_km"],
        zhyp_km=col["ztor_km"] + 0.5 * vertical, corners=corners,
        piece_rupture=np.concatenate(owners), piece_corners=piece_corners,
    )


class RuptureFit(NamedTuple):
    """Each magnitude's scaling-relation rupture against its fault (see :func:`rupture_fit`)."""

    mag: FloatArray  #: magnitudes [Mw]
    length_km: FloatArray  #: scaling-relation length, width limited to the fault's [km]
    width_km: FloatArray  #: scaling-relation width, limited to the fault's [km]
    fault_length_km: float  #: [km]
    fault_width_km: float  #: [km]

    @property
    def area_km2(self) -> FloatArray:
        """Scaling-relation area of each magnitude's rupture [km^2] (the width limit keeps it)."""
        return self.length_km * self.width_km

    @property
    def fault_area_km2(self) -> float:
        """Fault area [km^2], length along the trace times width down dip."""
        return self.fault_length_km * self.fault_width_km

    @property
    def capped(self) -> NDArray[np.bool_]:
        """Magnitudes whose rupture is longer than the fault: capped at the fault length, less area."""
        return self.length_km > self.fault_length_km

    @property
    def area_above_fault(self) -> NDArray[np.bool_]:
        """Magnitudes whose scaling-relation area exceeds the fault area (a subset of :attr:`capped`)."""
        return self.area_km2 > self.fault_area_km2


def rupture_fit(frame: FaultFrame, mags, rake_deg, *, min_aspect_ratio=1.0, relation="width",
                slip_type=None) -> RuptureFit:
    """How each magnitude's rupture fits a fault, before the length cap of the rupture builder.

    Parameters
    ----------
    frame : FaultFrame
        From :func:`~quakefolio.core.sources.ruptures.fault_frame`.
    mags : array_like [Mw]
    rake_deg : float [deg]
    min_aspect_ratio, relation, slip_type
        As for the rupture builder.

    Returns
    -------
    RuptureFit

    Notes
    -----
    The dimensions are those :func:`~quakefolio.core.sources.ruptures.fault_rupture_dimensions`
    starts from (Wells & Coppersmith 1994, width limited to the fault width with the excess area
    moved to length), so :attr:`RuptureFit.capped` marks exactly the magnitudes the builder caps.
    With the width at the fault width, the length exceeds the fault's exactly when the area
    exceeds the fault's; a narrower rupture may be capped in length with an area that would fit.
    """
    m = np.asarray(mags, dtype=np.float64).reshape(-1)
    lengths, widths = wc94_dimensions(m, rake_deg, max_width_km=frame.width_km, min_aspect_ratio=min_aspect_ratio,
                                      relation=relation, slip_type=slip_type)
    return RuptureFit(m, lengths, np.minimum(widths, frame.width_km), frame.length_km, frame.width_km)
