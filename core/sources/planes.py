r"""Exact distances from sites at the surface to rectangles and to surfaces of several rectangles,
in a local plane: ``x`` east and ``y`` north [km], depth down [km].

:mod:`quakefolio.core.sources.geometry` projects sites and ruptures into this plane and calls the
functions here; nothing here knows longitudes, latitudes or rupture sets.

Rectangle
---------
A rectangle is given by its top edge (start and end, at depth ``ztor``), dip and down-dip width,
dipping to the right of the top edge's direction (Aki & Richards convention).  :func:`kernel` gives
Rrup, Rjb, Rx and Ry0 exactly (no meshing): the site in the rectangle's own frame (along strike,
down dip, normal), clamped to the rectangle.

Surface of several rectangles
-----------------------------
A rupture on a bent fault is the union of rectangles ("pieces"), one per fault segment it spans,
in order along the fault.  :func:`surface_distances` gives, for that union:

* ``rrup_km`` and ``rjb_km``: minima over the pieces of the rectangle distances (the closest
  point of a union lies on one of its members; the surface projection of the union is the union
  of the pieces' projections);
* ``rx_km`` and ``ry0_km``: from the generalized coordinates :math:`(T, U)` of Spudich & Chiou
  (2015), computed on the pieces' top edges as one trace (:func:`generalized_coordinates`):
  :math:`R_x = T`, :math:`R_{y0} = \max(-U, U - L, 0)` with :math:`L` the summed length of the
  top edges.  For one piece they reduce to the rectangle's own Rx and Ry0.

References
----------
Spudich, P. & Chiou, B. S.-J. (2015). Strike-parallel and strike-normal coordinate system around
geometrically complicated rupture traces: use by NGA-West2 and further improvements. U.S.
Geological Survey Open-File Report 2015-1028.
Ancheta, T. D. et al. (2014). NGA-West2 database. Earthquake Spectra 30(3), 989-1005.
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np
from numpy.typing import NDArray

__all__ = ["Frames", "rectangle_frames", "take", "kernel", "generalized_coordinates", "surface_distances",
           "ON_TRACE_KM"]

FloatArray = NDArray[np.float64]

#: A site closer than this [km] to the line of a top edge, and within its ends (with the same
#: margin), lies on the trace: there :math:`T = 0` and :math:`U` is its position along the trace
#: (the weight of that piece is infinite).
ON_TRACE_KM = 1e-9


class Frames(NamedTuple):
    """Rectangles in the local plane (every field of shape (n,))."""

    x0: FloatArray  # top-start corner, east [km]
    y0: FloatArray  # top-start corner, north [km]
    ux: FloatArray  # unit strike vector, east component
    uy: FloatArray  # unit strike vector, north component
    length: FloatArray  # along-strike length of the projected top edge [km]
    width: FloatArray  # down-dip width [km]
    width_h: FloatArray  # horizontal width of the surface projection, W cos(dip) [km]
    cosd: FloatArray
    sind: FloatArray
    ztor_sind: FloatArray  # ztor sin(dip) [km]
    ztor_cosd: FloatArray  # ztor cos(dip) [km]
    ztor: FloatArray


def rectangle_frames(x0, y0, x1, y1, dip_deg, width_km, ztor_km) -> Frames:
    """Frames of rectangles from their projected top edges [km], dips [deg], widths and top depths [km].

    Parameters
    ----------
    x0, y0, x1, y1 : ndarray, shape (n,) [km]
        Start and end of each top edge, projected.
    dip_deg : ndarray, shape (n,) [deg]
        Dip in (0, 90], to the right of start -> end.
    width_km, ztor_km : ndarray, shape (n,) [km]

    Returns
    -------
    Frames

    Raises
    ------
    ValueError
        If a top edge has zero length.
    """
    length = np.hypot(x1 - x0, y1 - y0)
    if np.any(length <= 0.0):
        raise ValueError("ruptures: a rupture has a top edge of zero length")
    ux = (x1 - x0) / length
    uy = (y1 - y0) / length
    dip = np.radians(np.asarray(dip_deg, dtype=np.float64))
    cosd = np.cos(dip)
    cosd[np.asarray(dip_deg) == 90.0] = 0.0  # exact zero for vertical planes
    sind = np.sin(dip)
    width = np.asarray(width_km, dtype=np.float64)
    ztor = np.asarray(ztor_km, dtype=np.float64)
    return Frames(x0, y0, ux, uy, length, width, width * cosd, cosd, sind, ztor * sind, ztor * cosd, ztor)


def take(frames: Frames, index) -> Frames:
    """The frames selected by ``index`` (any numpy index)."""
    return Frames(*(f[index] for f in frames))


def kernel(sx, sy, f: Frames, out, scratch) -> None:
    """Exact distances for broadcastable site coordinates and rectangle frames.

    Writes Rrup, Rjb, Rx and Ry0 [km] into the four arrays of ``out`` (the broadcast shape);
    ``scratch`` holds three work arrays of that shape. Every step is an in-place ufunc, so a
    block costs no allocation (formulas: :func:`quakefolio.core.sources.geometry.rupture_distances`).
    """
    rrup, rjb, rx, ry0 = out
    s1, s2, s3 = scratch
    np.subtract(sx, f.x0, out=s1)  # east offset from the top-start corner
    np.subtract(sy, f.y0, out=s2)  # north offset
    # Rx: perpendicular to strike, positive toward the dip direction (right of strike)
    np.multiply(s1, f.uy, out=rx)
    np.multiply(s2, f.ux, out=s3)
    rx -= s3
    # along strike from the top-start corner
    np.multiply(s1, f.ux, out=s3)
    np.multiply(s2, f.uy, out=s1)
    s3 += s1
    # Ry0 = distance of `along` outside [0, L]
    np.subtract(s3, f.length, out=ry0)
    np.negative(s3, out=s1)
    np.maximum(ry0, s1, out=ry0)
    np.maximum(ry0, 0.0, out=ry0)
    # Rjb: also the distance of Rx outside [0, W cos(dip)]; sqrt(x*x + y*y), not np.hypot
    # (~20x faster here, no overflow risk at km scale)
    np.subtract(rx, f.width_h, out=s1)
    np.negative(rx, out=s2)
    np.maximum(s1, s2, out=s1)
    np.maximum(s1, 0.0, out=s1)
    np.multiply(ry0, ry0, out=rjb)
    s1 *= s1
    rjb += s1
    np.sqrt(rjb, out=rjb)
    # Rrup: site at (along, Rx, -ztor) in (strike, dip direction, down) from the corner;
    # down-dip coordinate clamped to [0, W], normal coordinate as is
    np.multiply(rx, f.cosd, out=s1)
    s1 -= f.ztor_sind
    np.subtract(s1, f.width, out=s2)
    np.negative(s1, out=s3)
    np.maximum(s2, s3, out=s2)
    np.maximum(s2, 0.0, out=s2)
    np.multiply(rx, f.sind, out=s1)
    s1 += f.ztor_cosd
    np.multiply(ry0, ry0, out=rrup)
    s2 *= s2
    rrup += s2
    s1 *= s1
    rrup += s1
    np.sqrt(rrup, out=rrup)


def generalized_coordinates(t_km, u_km, length_km, offset_km, starts):
    r"""Generalized coordinates :math:`(T, U)` [km] of sites about traces made of segments.

    Parameters
    ----------
    t_km, u_km : ndarray, shape (..., n_segments) [km]
        Each site's coordinates in each segment's own frame: :math:`t_i` perpendicular to the
        segment, positive to its right (the dip direction), and :math:`u_i` along it from its start.
    length_km : ndarray, shape (n_segments,) or broadcastable [km]
        Segment lengths :math:`\ell_i > 0`.
    offset_km : ndarray, broadcastable like ``length_km`` [km]
        :math:`s_i`: the length of the trace before segment ``i`` (0 for a trace's first segment).
    starts : ndarray of int, shape (n_traces,)
        Index of each trace's first segment along the last axis (segments of one trace are
        contiguous and in order; ``starts[0] = 0``, increasing).

    Returns
    -------
    t, u : ndarray, shape (..., n_traces) [km]

    Notes
    -----
    Spudich & Chiou (2015) weight each segment by the integral of :math:`1/r^2` along it (their
    definitions as recalled here from memory; the closed form below is derived here and checked
    against numerical quadrature in ``tests/test_faults.py``),

    .. math::

        w_i = \int_0^{\ell_i} \frac{ds}{(s - u_i)^2 + t_i^2}
            = \frac{1}{|t_i|}\,\operatorname{atan2}\!\big(\ell_i |t_i|,\; t_i^2 + u_i(u_i - \ell_i)\big),

    (the sum of the two arctangents of their expression folded into one ``atan2``, exact for every
    :math:`t_i \ne 0`), with the limit :math:`w_i = \ell_i / (u_i(u_i - \ell_i))` on the
    segment's line outside the segment, and take

    .. math::

        T = \frac{\sum_i w_i t_i}{\sum_i w_i}, \qquad U = \frac{\sum_i w_i (u_i + s_i)}{\sum_i w_i}.

    A site on a segment (:math:`|t_i| \le` :data:`ON_TRACE_KM`, :math:`u_i` within the segment)
    has an infinite weight there: :math:`T = 0`, :math:`U = u_i + s_i`.  For a trace of one
    segment :math:`T = t_1`, :math:`U = u_1`.  The segment offsets :math:`s_i` are the lengths
    of the trace before each segment: their coordinate system for one trace whose segments follow
    one another (from memory; their further rules for several separate traces are not needed
    here). For the pieces of a rupture below the surface the top edges at a bend do not quite
    meet (see :mod:`quakefolio.core.sources.faults`); the offsets stay the along-trace lengths.

    References
    ----------
    Spudich, P. & Chiou, B. S.-J. (2015). U.S. Geological Survey Open-File Report 2015-1028.
    """
    t = np.asarray(t_km, dtype=np.float64)
    u = np.asarray(u_km, dtype=np.float64)
    ell = np.asarray(length_km, dtype=np.float64)
    abs_t = np.abs(t)
    on = (abs_t <= ON_TRACE_KM) & (u >= -ON_TRACE_KM) & (u <= ell + ON_TRACE_KM)
    near_line = abs_t <= ON_TRACE_KM
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(near_line, ell / (u * (u - ell)), np.arctan2(ell * abs_t, t * t + u * (u - ell)) / abs_t)
    w = np.where(on, 0.0, w)
    along = u + offset_km
    total = np.add.reduceat(w, starts, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        big_t = np.add.reduceat(w * t, starts, axis=-1) / total
        big_u = np.add.reduceat(w * along, starts, axis=-1) / total
    hit = np.logical_or.reduceat(on, starts, axis=-1)
    if np.any(hit):
        on_u = np.minimum.reduceat(np.where(on, along, np.inf), starts, axis=-1)
        big_t = np.where(hit, 0.0, big_t)
        big_u = np.where(hit, on_u, big_u)
    return big_t, big_u


def surface_distances(sx, sy, f: Frames, starts, offset_km, total_km):
    r"""Rrup, Rjb, Rx and Ry0 [km] from sites to surfaces made of several rectangles.

    Parameters
    ----------
    sx, sy : ndarray [km]
        Sites, broadcastable against the pieces along the last axis: shape (k, 1) for every site
        against every surface, or (n_rows,) with one site per piece row.
    f : Frames
        The pieces, shape (n_pieces,) (or (n_rows,)), those of one surface contiguous and in
        order along the fault.
    starts : ndarray of int, shape (n_surfaces,)
        Index of each surface's first piece.
    offset_km : ndarray, shape of the pieces [km]
        Top-edge length of the surface before each piece.
    total_km : ndarray, shape (n_surfaces,) [km]
        Top-edge length of each surface (sum over its pieces).

    Returns
    -------
    rrup, rjb, rx, ry0 : ndarray, shape (..., n_surfaces) [km]

    Notes
    -----
    Rrup and Rjb are minima over the pieces of :func:`kernel`; Rx and Ry0 follow from
    :func:`generalized_coordinates` of the pieces' top edges (module notes).  Work arrays hold
    one value per (site, piece).
    """
    shape = np.broadcast_shapes(np.shape(sx), np.shape(sy), f.x0.shape)
    out = [np.empty(shape) for _ in range(4)]
    kernel(sx, sy, f, out, np.empty((3,) + shape))
    rrup = np.minimum.reduceat(out[0], starts, axis=-1)
    rjb = np.minimum.reduceat(out[1], starts, axis=-1)
    u = (sx - f.x0) * f.ux + (sy - f.y0) * f.uy
    rx, big_u = generalized_coordinates(out[2], u, f.length, offset_km, starts)
    ry0 = np.maximum(np.maximum(-big_u, big_u - total_km), 0.0)
    return rrup, rjb, rx, ry0
