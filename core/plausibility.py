"""Plausibility bounds of user inputs: values no real input takes, and the unit they were likely written in.

Every bound below is a judgement stated with its reason.  Values beyond an *error* bound are
refused with one located line; values between a *warning* bound and an error bound are
accepted with one located warning line.  The readers decide where a value sits in its file;
this module only holds the bounds and the pure arithmetic (no file I/O, no pandas).

Acceleration units are converted with standard gravity :math:`g = 9.80665` m/s2 (CGPM 1901,
ISO 80000-3), as :data:`quakefolio.pipeline.io.config.IM_UNITS_TO_G` does.
"""
from __future__ import annotations

import math

import numpy as np

__all__ = [
    "ACCELERATION_UNITS_G", "LEVEL_ERROR_ABOVE_G", "LEVEL_WARN_ABOVE_G", "CURVE_TOP_ERROR_BELOW_G",
    "CURVE_TOP_WARN_BELOW_G", "MEDIAN_ERROR_ABOVE_G", "MEDIAN_ERROR_BELOW_G", "VS30_ERROR_BELOW_MPS",
    "VS30_ERROR_ABOVE_MPS", "MAX_MAGNITUDE", "SITE_DISTANCE_WARN_KM", "likely_acceleration_unit",
    "unit_advice", "median_problem", "vs30_problem",
]

#: Acceleration units a value may have been written in, coarsest first, with the size of one
#: unit in g (standard gravity 9.80665 m/s2).
ACCELERATION_UNITS_G = (("g", 1.0), ("m/s2", 1.0 / 9.80665), ("cm/s2", 1.0 / 980.665), ("mm/s2", 1.0 / 9806.65))

#: Hazard-curve IM levels [g].  The largest recorded peak ground accelerations are a few g
#: (about 3-4 g, from memory) and short-period spectral accelerations of records rarely exceed
#: about 10 g (from memory), so a tabulated level above 10 g is doubtful (warning) and one
#: above 30 g is no acceleration in g at all (error): levels written in m/s2 are 9.8 times,
#: in cm/s2 980 times too large when read as g.
LEVEL_WARN_ABOVE_G = 10.0
LEVEL_ERROR_ABOVE_G = 30.0
#: Top level of one hazard curve [g].  A curve that stops below 0.05 g stops below the
#: shaking that damages buildings (the least severe damage states of common fragility sets
#: have medians of about 0.1 g and more, from memory), so every damage rate comes from its
#: extrapolated tail (warning); one that stops below 0.01 g, about the threshold of shaking
#: felt indoors (from memory), is taken to be in the wrong unit (error): levels in g read as
#: cm/s2 are 980 times too small.
CURVE_TOP_WARN_BELOW_G = 0.05
CURVE_TOP_ERROR_BELOW_G = 0.01
#: Lognormal fragility medians [g].  A median above 10 g, several times the largest recorded
#: accelerations (a few g, from memory), is a state no recorded shaking reaches half the time:
#: such a value is in m/s2 or cm/s2 (error).  A median below 0.001 g lies below the
#: threshold of felt shaking (about 0.001-0.01 g, from memory): no building reaches a damage
#: state half the time at motions nobody feels (error).
MEDIAN_ERROR_ABOVE_G = 10.0
MEDIAN_ERROR_BELOW_G = 1e-3
#: Vs30 [m/s] outside which no ground is known: the softest soils (peat, bay mud) have
#: shear-wave velocities of about 70-100 m/s and hard unweathered rock about 2000-3000 m/s
#: (from memory); a value outside [50, 3000] m/s is a typing or unit error (km/s, ft/s).
#: The narrower ranges of the ground-motion models (``applicability`` of
#: :mod:`quakefolio.core.gmm`) give warnings only.
VS30_ERROR_BELOW_MPS = 50.0
VS30_ERROR_ABOVE_MPS = 3000.0
#: Largest plausible moment magnitude [Mw]: the largest recorded earthquake is Mw 9.5
#: (Chile 1960, from memory); a magnitude above 10 is refused.
MAX_MAGNITUDE = 10.0
#: Asset-to-hazard-site distance [km] beyond which the site's hazard stands for the asset's
#: only loosely: near active faults hazard changes by factors over a few tens of km (common
#: practice keeps hazard sites within a few km of the assets), so a larger distance warns.
SITE_DISTANCE_WARN_KM = 50.0


def likely_acceleration_unit(value, declared, lo_g, hi_g):
    """The coarsest unit other than ``declared`` under which ``value`` lies in ``[lo_g, hi_g]`` g.

    Parameters
    ----------
    value : float
        A number as written in the user's file.
    declared : str
        The unit it was read in (a name of :data:`ACCELERATION_UNITS_G`).
    lo_g, hi_g : float [g]
        The plausible range of the quantity.

    Returns
    -------
    (str, float) or None
        The unit's name and ``value`` converted from it to g, or None when no unit fits.
    """
    for name, size in ACCELERATION_UNITS_G:
        if name != declared and lo_g <= value * size <= hi_g:
            return name, value * size
    return None


def unit_advice(value, declared, lo_g, hi_g, accepted, lead="it looks like"):
    """The sentence naming the likely unit of an implausible acceleration, for a message.

    Parameters
    ----------
    value : float
        The number as written.
    declared : str
        The unit it was read in.
    lo_g, hi_g : float [g]
        The plausible range of the quantity.
    accepted : dict
        Unit name -> what to tell the user to do when the value is in that unit (e.g.
        ``'set [hazard] im_unit = "cm/s2"'``); a likely unit not in it gets "convert to g".
    lead : str
        Words before the unit's name.

    Returns
    -------
    str
        ``"; <lead> cm/s2 (0.2 g): <advice>"`` or ``""`` when no unit fits.
    """
    hit = likely_acceleration_unit(value, declared, lo_g, hi_g)
    if hit is None:
        return ""
    name, in_g = hit
    todo = accepted.get(name, "convert the values to g")
    return f"; {lead} {name} ({in_g:.3g} g): {todo}"


def median_problem(median_g):
    """Why a fragility median [g] is implausible, or None.

    Parameters
    ----------
    median_g : float [g]

    Returns
    -------
    str or None
        The message (bounds :data:`MEDIAN_ERROR_ABOVE_G`, :data:`MEDIAN_ERROR_BELOW_G`, with the
        likely unit), or None when the median is plausible.
    """
    m = float(median_g)
    if MEDIAN_ERROR_BELOW_G <= m <= MEDIAN_ERROR_ABOVE_G:
        return None
    if m > MEDIAN_ERROR_ABOVE_G:
        hint = unit_advice(m, "g", MEDIAN_ERROR_BELOW_G, MEDIAN_ERROR_ABOVE_G, {})
        return (f"median {m:g} g is far above any recorded ground motion (a few g; medians above "
                f"{MEDIAN_ERROR_ABOVE_G:g} g are refused){hint or '; medians are in g'}")
    return (f"median {m:g} g is below the threshold of felt shaking (medians below {MEDIAN_ERROR_BELOW_G:g} g "
            "are refused); medians are in g, e.g. 0.3 for 0.3 g")


def vs30_problem(vs30_mps):
    """Why a Vs30 [m/s] is no ground at all, or None (bounds :data:`VS30_ERROR_BELOW_MPS`,
    :data:`VS30_ERROR_ABOVE_MPS`).

    Parameters
    ----------
    vs30_mps : float [m/s]

    Returns
    -------
    str or None
        The message with the likely unit (km/s, ft/s) where one fits, or None.
    """
    v = float(vs30_mps)
    lo, hi = VS30_ERROR_BELOW_MPS, VS30_ERROR_ABOVE_MPS
    if lo <= v <= hi or math.isnan(v):
        return None
    hint = ""
    if lo <= v * 1000.0 <= hi:
        hint = f"; it looks like km/s ({v * 1000.0:g} m/s): give Vs30 in m/s"
    elif lo <= v * 0.3048 <= hi:
        hint = f"; it looks like ft/s ({v * 0.3048:.0f} m/s): give Vs30 in m/s"
    return f"Vs30 {v:g} m/s is outside the range of any ground ({lo:g}-{hi:g} m/s){hint}"
