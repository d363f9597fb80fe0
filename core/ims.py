"""Intensity-measure names: ``PGA`` and ``SA_<period in s>`` (values in g); the one parser.

Every IM name of the project, at the file boundary (config, fragility library, hazard-curve
files) and inside the core (ground-motion models, correlation models), is read by
:func:`parse_im` here.  Accepted: ``PGA``, and ``SA_`` followed by a decimal period in
(0, 20] s with digits on both sides of an optional point (``SA_1``, ``SA_0.3``,
``SA_0.30``); surrounding blanks are ignored.  Rejected: anything else (``SA_.5``,
``SA_1.``, ``SA(1.0)``, ``PGV``).

Period of PGA
-------------
PGA has no oscillator period; two conventions are needed and both are defined here:

* :data:`PGA_PERIOD_S` = 0.01 s (:func:`im_period`): PGA taken as spectral acceleration
  at 0.01 s wherever a positive period is needed, i.e. interpolation across periods
  (log-log) and the cross-IM correlation model of Baker & Jayaram (2008), which is
  defined from 0.01 s (common practice: PGA approximates SA at very short period).
* :data:`PGA_MODEL_PERIOD_S` = 0.0 s (:func:`model_period`): the key of PGA in the
  ground-motion models' coefficient tables (NGA-West2 tables list PGA at T = 0) and the
  period at which the spatial-correlation range of Jayaram & Baker (2009) is evaluated
  for PGA (their Eq. 17 at T = 0).
"""
from __future__ import annotations

import math
import re

__all__ = ["parse_im", "im_period", "model_period", "log_period", "PGA_PERIOD_S", "PGA_MODEL_PERIOD_S",
           "MAX_PERIOD_S"]

#: Period [s] standing for PGA where a positive period is needed (see module notes).
PGA_PERIOD_S = 0.01
#: Period [s] of PGA in ground-motion coefficient tables (see module notes).
PGA_MODEL_PERIOD_S = 0.0
#: Longest accepted spectral period [s].
MAX_PERIOD_S = 20.0

_SA = re.compile(r"^SA_(\d+(?:\.\d+)?)$")


def _read(name):
    """(stripped name, period [s] or None for PGA) of a valid IM name; ValueError otherwise."""
    if not isinstance(name, str):
        raise ValueError(f"an IM name must be a string like 'PGA' or 'SA_1.0', got {name!r}")
    s = name.strip()
    if s == "PGA":
        return s, None
    m = _SA.match(s)
    if not m:
        raise ValueError(f"unknown IM {name!r}: expected 'PGA' or 'SA_<period in s>', e.g. 'SA_0.3'")
    period = float(m.group(1))
    if not 0 < period <= MAX_PERIOD_S:
        raise ValueError(f"IM {name!r}: period must lie in (0, 20] s")
    return s, period


def parse_im(name):
    """Return the canonical IM name for ``name`` or raise ValueError.

    Parameters
    ----------
    name : str
        ``"PGA"`` or ``"SA_<period in s>"`` (see the module notes for the accepted forms).

    Returns
    -------
    str
        ``"PGA"`` stays; ``"SA_0.30"`` becomes ``"SA_0.3"``, ``"SA_1"`` ``"SA_1.0"``;
        periods must lie in (0, 20] s.
    """
    _, period = _read(name)
    if period is None:
        return "PGA"
    return f"SA_{period:g}" if "." in f"{period:g}" else f"SA_{period:.1f}"


def im_period(name):
    """Oscillator period [s] of an IM name, PGA taken as SA at :data:`PGA_PERIOD_S`.

    Parameters
    ----------
    name : str
        An IM name (:func:`parse_im`).

    Returns
    -------
    float
        Period [s] of the canonical name; ``PGA_PERIOD_S`` (0.01 s) for PGA.
    """
    canon = parse_im(name)
    return PGA_PERIOD_S if canon == "PGA" else float(canon[3:])


def model_period(name):
    """Period [s] under which ground-motion models tabulate an IM: 0.0 for PGA.

    Parameters
    ----------
    name : str
        An IM name (:func:`parse_im`).

    Returns
    -------
    float
        The period written in the name [s] (not rounded to the canonical form);
        :data:`PGA_MODEL_PERIOD_S` (0.0) for PGA.
    """
    _, period = _read(name)
    return PGA_MODEL_PERIOD_S if period is None else period


def log_period(name):
    """Natural log of :func:`im_period` [ln s].

    Parameters
    ----------
    name : str

    Returns
    -------
    float [ln s]
    """
    return math.log(im_period(name))
