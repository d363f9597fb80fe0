r"""How many ruptures a source gives, counted without building them.

Each count follows the construction of :mod:`quakefolio.core.sources.ruptures` step by
step, with the same floating-point operations, so it equals ``len()`` of the
:class:`~quakefolio.core.sources.ruptures.RuptureSet` the builder would return (tested), at
a cost independent of that number:

* fault, planar or bent (:func:`fault_rupture_count`): per magnitude bin, ``n_along x n_down``
  floating positions, ``n = ceil(room / step) + 1`` along each direction
  (:func:`floating_position_counts`), the room being what the rupture leaves of the fault
  (:func:`~quakefolio.core.sources.ruptures.fault_rupture_dimensions`; on a bent fault
  along the whole trace, a rupture across a joint being one rupture of several pieces);
* point source (:func:`point_rupture_count`): one rupture per (mechanism, strike, magnitude,
  hypocentral depth);
* area source: the point-source count times the grid points inside the polygon
  (:func:`polygon_point_count`), counted row by row of the grid.

A caller can thus refuse a source whose rupture count would not fit in memory before any
rupture array is allocated.
"""
from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from quakefolio.core.sources.ruptures import fault_frame, fault_rupture_dimensions, polygon_frame

__all__ = ["FaultCount", "PolygonCount", "magnitude_bin_count", "floating_position_counts", "fault_rupture_count",
           "point_rupture_count", "polygon_point_count", "MAX_SWEEP_ROWS"]

#: Largest number of grid rows (or columns) :func:`polygon_point_count` sweeps exactly;
#: beyond, the count is the polygon's area over the cell area (an estimate).
MAX_SWEEP_ROWS = 2_000_000
_BLOCK_CELLS = 1 << 16  # rows x edges of one vectorised pass


def magnitude_bin_count(span_mag: float, bin_width: float) -> int:
    """Number of magnitude bins of width ``bin_width`` over ``span_mag`` [Mw].

    Parameters
    ----------
    span_mag : float [Mw]
        E.g. ``max_mag - min_mag`` of a truncated Gutenberg-Richter distribution.
    bin_width : float [Mw], > 0

    Returns
    -------
    int
        ``round(span / bin_width)``, as :mod:`quakefolio.core.sources.mfd` bins (which
        further require the ratio to be a whole number).
    """
    if not (math.isfinite(bin_width) and bin_width > 0.0 and math.isfinite(span_mag)):
        raise ValueError(f"bin_width must be > 0 and the span finite; got span {span_mag!r}, bin_width {bin_width!r}")
    return max(0, int(round(span_mag / bin_width)))


def floating_position_counts(room_km: ArrayLike, step_km: float) -> np.ndarray:
    """Positions of a floating rupture over ``room_km`` at spacing at most ``step_km``.

    Parameters
    ----------
    room_km : array_like [km]
        Fault length (or width) minus the rupture's.
    step_km : float [km], > 0

    Returns
    -------
    ndarray of float, shape of ``room_km``
        1 where the room is nil (<= 1e-9 km), else ``ceil(room / step - 1e-9) + 1``
        (whole numbers, held as floats so that products cannot overflow).
    """
    room = np.asarray(room_km, dtype=np.float64)
    return np.where(room <= 1e-9, 1.0, np.ceil(room / step_km - 1e-9) + 1.0)


class FaultCount(NamedTuple):
    """Ruptures of a fault and the factors of that number."""

    n_ruptures: int  #: total over magnitude bins
    n_magnitudes: int  #: magnitude bins
    max_along: int  #: most positions along strike of one magnitude
    max_down: int  #: most positions down dip of one magnitude
    length_km: float  #: fault length along the trace [km]
    width_km: float  #: fault width down dip [km]


def fault_rupture_count(source_id, trace, *, dip_deg, upper_depth_km, lower_depth_km, rake_deg, mags,
                        rupture_step_km, min_aspect_ratio=1.0, relation="width", slip_type=None) -> FaultCount:
    """Number of ruptures :func:`~quakefolio.core.sources.faults.fault_ruptures` builds.

    Parameters
    ----------
    source_id : str
        Named in errors.
    trace : sequence of (lon, lat) [deg]
    dip_deg : float [deg]
    upper_depth_km, lower_depth_km : float [km]
    rake_deg : float [deg]
    mags : array_like [Mw]
        Magnitude bins (centres) of the fault's distribution.
    rupture_step_km : float [km]
    min_aspect_ratio, relation, slip_type
        As for the builder.

    Returns
    -------
    FaultCount

    Notes
    -----
    The builder places each magnitude's rupture at ``n_along x n_down`` positions
    (module notes); the count sums that product over the bins, at the cost of one
    scaling-relation evaluation per bin.
    """
    step = float(rupture_step_km)
    if not (math.isfinite(step) and step > 0.0):
        raise ValueError(f"rupture_step_km must be > 0; got {rupture_step_km!r}")
    frame = fault_frame(source_id, trace, float(dip_deg), float(upper_depth_km), float(lower_depth_km))
    m = np.asarray(mags, dtype=np.float64).reshape(-1)
    lengths, widths = fault_rupture_dimensions(frame, m, float(rake_deg), min_aspect_ratio=min_aspect_ratio,
                                               relation=relation, slip_type=slip_type)
    along = floating_position_counts(frame.length_km - lengths, step)
    down = floating_position_counts(frame.width_km - widths, step)
    total = float(np.sum(along * down))
    return FaultCount(int(total), int(m.size), int(along.max(initial=0)), int(down.max(initial=0)),
                      frame.length_km, frame.width_km)


def point_rupture_count(n_magnitudes: int, n_depths: int, n_mechanisms: int, n_strikes: int = 1) -> int:
    """Ruptures of one point source location: one per (mechanism, strike, magnitude, depth).

    Parameters
    ----------
    n_magnitudes, n_depths, n_mechanisms : int
    n_strikes : int, optional
        Strikes each mechanism is crossed with
        (:func:`~quakefolio.core.sources.strikes.mechanisms_with_strikes`); 1 when the
        mechanisms carry their own strike.

    Returns
    -------
    int
    """
    return int(n_magnitudes) * int(n_depths) * int(n_mechanisms) * int(n_strikes)


class PolygonCount(NamedTuple):
    """Grid points of an area source."""

    n_points: int  #: points inside the polygon
    exact: bool  #: False: area / spacing^2 (grid too large to sweep)
    spacing_km: float  #: grid spacing [km]


def polygon_point_count(polygon, spacing_km) -> PolygonCount:
    """Number of grid points :func:`~quakefolio.core.sources.ruptures.polygon_grid` keeps.

    Parameters
    ----------
    polygon : sequence of (lon, lat) [deg]
    spacing_km : float [km], > 0

    Returns
    -------
    PolygonCount

    Notes
    -----
    The grid builder tests every grid point by even-odd ray casting
    (:func:`~quakefolio.core.sources.geometry.points_in_polygon`): a point is inside when
    an odd number of polygon edges cross the horizontal line of its row strictly to its
    right. Along one row the crossings are the same for every point, so with the ``k``
    crossings sorted, the grid points between the ``m``-th and the ``(m+1)``-th have
    ``k - m`` crossings to their right; the points of a row inside the polygon are
    counted by a sorted search of the crossings among the row's x coordinates, with the
    very crossing abscissae the builder computes. Cost: rows x edges, not rows x columns.
    Beyond :data:`MAX_SWEEP_ROWS` rows or columns the shoelace area over the cell area
    is returned instead (``exact=False``).
    """
    frame = polygon_frame(polygon, spacing_km)
    nx, ny = frame.n
    if max(nx, ny) > MAX_SWEEP_ROWS:
        vx, vy = frame.vx, frame.vy
        area = 0.5 * abs(float(np.dot(vx, np.roll(vy, -1)) - np.dot(np.roll(vx, -1), vy)))  # shoelace
        return PolygonCount(int(min(area / frame.step_km ** 2, float(nx) * float(ny))), False, frame.step_km)
    gx, gy = frame.axis(0), frame.axis(1)
    x1, y1 = frame.vx, frame.vy
    x2, y2 = np.roll(x1, -1), np.roll(y1, -1)
    n_edges = x1.size
    rows = max(1, _BLOCK_CELLS // n_edges)
    total = 0
    for start in range(0, ny, rows):
        qy = gy[start:start + rows, None]
        straddles = (y1 > qy) != (y2 > qy)
        with np.errstate(divide="ignore", invalid="ignore"):
            x_cross = x1 + (qy - y1) * (x2 - x1) / (y2 - y1)
        x_cross = np.sort(np.where(straddles, x_cross, np.inf), axis=1)
        k = np.count_nonzero(straddles, axis=1)
        # grid points left of each crossing; crossings padded with +inf give nx
        left = np.searchsorted(gx, x_cross.ravel(), side="left").reshape(x_cross.shape)
        bounds = np.concatenate([np.zeros((left.shape[0], 1), dtype=left.dtype), left], axis=1)
        width = np.diff(bounds, axis=1)  # points with m = 0, 1, ... crossings on their left
        m = np.arange(width.shape[1])
        odd = ((k[:, None] - m[None, :]) % 2 == 1) & (m[None, :] < k[:, None])
        total += int(np.sum(width * odd))
    return PolygonCount(total, True, frame.step_km)
