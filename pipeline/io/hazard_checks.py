"""Checks of tabulated hazard curves beyond one cell: the statistic asked for, flat curves, and IM
levels far from any real ground motion (likely a wrong ``[hazard] im_unit``).

Used by :func:`quakefolio.pipeline.io.ingest.read_hazard_curves`; every error is an
:class:`~quakefolio.core.errors.InputError` and every doubt an
:class:`~quakefolio.core.errors.InputWarning`, both naming the file, row and column.  The
bounds and their reasons are in :mod:`quakefolio.core.plausibility`.
"""
from __future__ import annotations

import numpy as np

from quakefolio.core.errors import InputError, InputWarning
from quakefolio.core.plausibility import (
    CURVE_TOP_ERROR_BELOW_G, CURVE_TOP_WARN_BELOW_G, LEVEL_ERROR_ABOVE_G, LEVEL_WARN_ABOVE_G, unit_advice,
)

__all__ = ["statistic_rows", "check_flat_curves", "check_levels", "zero_curve_warning"]


def statistic_rows(path, frame, rows, site, ims, statistic):
    """The records of the statistic asked for; every site and IM of the file must have some.

    Parameters
    ----------
    path : str or Path
        The hazard file (named in errors).
    frame : pandas.DataFrame
        The file's records (:func:`quakefolio.pipeline.io.ingest.read_table`).
    rows : ndarray of int (n,)
        User-facing row of each record.
    site, ims : ndarray of str (n,)
        Site id and canonical IM name of each record.
    statistic : str
        ``[hazard] statistic``.

    Returns
    -------
    ndarray of bool (n,)
        True for the records kept (all records when the file has no ``statistic`` column and
        the statistic asked for is ``"mean"``).

    Raises
    ------
    InputError
        A statistic other than ``"mean"`` asked of a file without a ``statistic`` column; no
        record of the statistic; a site or an IM that has curves of other statistics only.
    """
    if "statistic" not in frame.columns:
        if statistic != "mean":
            raise InputError(path, f"[hazard] statistic = {statistic!r} asks for labelled curves, but the file has no "
                                   "statistic column (its curves carry no label); remove the key or add the column",
                             row=1, column="statistic")
        return np.ones(len(frame), dtype=bool)
    stat = frame["statistic"].astype(str).str.strip().to_numpy(dtype=object)
    keep = stat == statistic
    if not keep.any():
        raise InputError(path, f"no curves with statistic {statistic!r}; the file has {sorted(set(stat))}",
                         row=int(rows[0]), column="statistic")
    for what, keys in (("site", site), ("IM", ims)):
        lacking = ~np.isin(keys, np.unique(keys[keep]))
        if lacking.any():
            i = int(np.argmax(lacking))
            others = sorted(set(stat[keys == keys[i]]))
            name = f"site {str(keys[i])!r}" if what == "site" else str(keys[i])
            raise InputError(path, f"{name} has no curves with statistic {statistic!r}, only {others} (every site "
                                   "and IM needs curves of the statistic used)", row=int(rows[i]), column="statistic")
    return keep


def check_flat_curves(path, site_ids, curves, rows):
    """Refuse a curve with the same positive rate at every level.

    Such a curve says every event exceeds the top level and nothing of how often stronger
    shaking occurs; a site without hazard has rates of 0 instead (accepted).

    Parameters
    ----------
    path : str or Path
    site_ids : ndarray of str (n_sites,)
    curves : Mapping IM -> (levels (n_sites, n) [g], rates (n_sites, n) [1/yr])
    rows : Mapping IM -> ndarray of int (n_sites, n)
        File row of every point.

    Raises
    ------
    InputError
        At the first row of the first flat curve, column ``annual_rate``.
    """
    for im, (levels, rates) in curves.items():
        flat = (rates[:, 0] == rates[:, -1]) & (rates[:, 0] > 0)
        if flat.any():
            i = int(np.argmax(flat))
            raise InputError(path, f"hazard curve of site {str(site_ids[i])!r}, {im} is flat: rate {rates[i, 0]:g} /yr "
                                   f"at every level from {levels[i, 0]:g} to {levels[i, -1]:g} g, so it says nothing "
                                   "of how often stronger shaking occurs; rates must fall with im_level (or be 0 at "
                                   "every level at a site without hazard)", row=int(rows[im][i, 0]),
                             column="annual_rate")


def _extreme(curves, rows, part, *, largest):
    """``(im, site, level index, level [g], row)`` of the largest (or smallest) value of ``part(levels)``
    over every curve; ties go to the first row of the file."""
    best = None
    for im, (levels, _) in curves.items():
        values = part(levels)
        offset = levels.shape[1] - values.shape[1]
        v = float(values.max() if largest else values.min())
        r = rows[im][:, offset:]
        row = int(r[values == v].min())
        key = (-v if largest else v, row)
        if best is None or key < best[0]:
            a, b = np.argwhere((values == v) & (r == row))[0]
            best = (key, (im, int(a), int(b) + offset, v, row))
    return best[1]


def zero_curve_warning(path, site_ids, curves, rows):
    """A warning for curves that are 0 at every level (a site without hazard: accepted, its assets
    get no damage from that IM); None if there are none.

    Parameters
    ----------
    path : str or Path
    site_ids : ndarray of str (n_sites,)
    curves : Mapping IM -> (levels (n_sites, n) [g], rates (n_sites, n) [1/yr])
    rows : Mapping IM -> ndarray of int (n_sites, n)

    Returns
    -------
    InputWarning or None
        At the first row (in the file) of the first such curve, column ``annual_rate``.
    """
    found = [(int(rows[im][i, 0]), im, i) for im, (_, rates) in curves.items() for i in np.flatnonzero(rates[:, 0] == 0)]
    if not found:
        return None
    row, im, i = min(found)
    more = "" if len(found) == 1 else f" ({len(found) - 1} more curves are 0 everywhere)"
    return InputWarning(path, f"hazard curve of site {str(site_ids[i])!r}, {im} is 0 at every level: a site without "
                              f"hazard, whose assets get no damage from {im}{more}", row=row, column="annual_rate")


def _set_unit(unit):
    return f'set [hazard] im_unit = "{unit}"'


def check_levels(path, site_ids, curves, rows, im_unit, units_to_g):
    """IM levels against the bounds of real ground motion (:mod:`quakefolio.core.plausibility`).

    The largest level of the file above :data:`~quakefolio.core.plausibility.LEVEL_ERROR_ABOVE_G`
    and a curve ending below :data:`~quakefolio.core.plausibility.CURVE_TOP_ERROR_BELOW_G` are
    errors; above :data:`~quakefolio.core.plausibility.LEVEL_WARN_ABOVE_G` or ending below
    :data:`~quakefolio.core.plausibility.CURVE_TOP_WARN_BELOW_G` a warning.  Each message
    names the value as written and the unit it looks like.

    Parameters
    ----------
    path : str or Path
    site_ids : ndarray of str (n_sites,)
    curves : Mapping IM -> (levels (n_sites, n) [g], rates (n_sites, n) [1/yr])
    rows : Mapping IM -> ndarray of int (n_sites, n)
    im_unit : str
        ``[hazard] im_unit``, the unit the levels were read in.
    units_to_g : Mapping
        Accepted unit -> its size in g.

    Returns
    -------
    list of InputWarning
        At most one.

    Raises
    ------
    InputError
        At the row of the offending level, column ``im_level``.
    """
    high = _extreme(curves, rows, lambda levels: levels, largest=True)
    low = _extreme(curves, rows, lambda levels: levels[:, -1:], largest=False)
    accepted = {u: _set_unit(u) for u in units_to_g}
    size = units_to_g[im_unit]

    def written(g):
        raw = g / size
        return f"im_level {raw:g} {im_unit}" + ("" if im_unit == "g" else f" ({g:.3g} g)"), raw

    def place(hit):
        return {"row": hit[4], "column": "im_level"}

    text, raw = written(high[3])
    if high[3] > LEVEL_ERROR_ABOVE_G:
        raise InputError(path, f"{text} is far above any recorded ground motion (a few g; levels above "
                               f"{LEVEL_ERROR_ABOVE_G:g} g are refused)"
                               f"{unit_advice(raw, im_unit, CURVE_TOP_ERROR_BELOW_G, LEVEL_WARN_ABOVE_G, accepted)}",
                         **place(high))
    low_text, low_raw = written(low[3])
    where = f"hazard curve of site {str(site_ids[low[1]])!r}, {low[0]} ends at {low_text}"
    if low[3] < CURVE_TOP_ERROR_BELOW_G:
        raise InputError(path, f"{where}, below the shaking felt indoors (about {CURVE_TOP_ERROR_BELOW_G:g} g; curves "
                               "ending there are refused)"
                               f"{unit_advice(low_raw, im_unit, CURVE_TOP_WARN_BELOW_G, LEVEL_WARN_ABOVE_G, accepted)}",
                         **place(low))
    if high[3] > LEVEL_WARN_ABOVE_G:
        hint = unit_advice(raw, im_unit, CURVE_TOP_WARN_BELOW_G, LEVEL_WARN_ABOVE_G, accepted, lead="if it is in")
        return [InputWarning(path, f"{text} is above any recorded ground motion (a few g){hint}", **place(high))]
    if low[3] < CURVE_TOP_WARN_BELOW_G:
        hint = unit_advice(low_raw, im_unit, CURVE_TOP_WARN_BELOW_G, LEVEL_WARN_ABOVE_G, accepted, lead="if it is in")
        return [InputWarning(path, f"{where}, below the shaking that damages buildings (about "
                                   f"{CURVE_TOP_WARN_BELOW_G:g} g): its damage rates come from the extrapolated "
                                   f"tail{hint}", **place(low))]
    return []
