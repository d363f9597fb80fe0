"""Intensity-measure names: ``PGA`` and ``SA_<period in s>`` (values in g).

PGA is treated as spectral acceleration at 0.01 s where a period is needed for
interpolation across periods (common practice: PGA approximates SA at very short
period).
"""
from __future__ import annotations

import math
import re

__all__ = ["parse_im", "im_period", "PGA_PERIOD_S"]

PGA_PERIOD_S = 0.01
_SA = re.compile(r"^SA_(\d+(?:\.\d+)?)$")


def parse_im(name):
    """Return the canonical IM name for ``name`` or raise ValueError.

    ``"PGA"`` stays; ``"SA_0.30"`` becomes ``"SA_0.3"``; periods must lie in (0, 20] s.
    """
    if not isinstance(name, str):
        raise ValueError(f"an IM name must be a string like 'PGA' or 'SA_1.0', got {name!r}")
    s = name.strip()
    if s == "PGA":
        return "PGA"
    m = _SA.match(s)
    if not m:
        raise ValueError(f"unknown IM {name!r}: expected 'PGA' or 'SA_<period in s>', e.g. 'SA_0.3'")
    period = float(m.group(1))
    if not 0 < period <= 20:
        raise ValueError(f"IM {name!r}: period must lie in (0, 20] s")
    return f"SA_{period:g}" if "." in f"{period:g}" else f"SA_{period:.1f}"


def im_period(name):
    """Oscillator period [s] of an IM name (PGA -> ``PGA_PERIOD_S``)."""
    canon = parse_im(name)
    return PGA_PERIOD_S if canon == "PGA" else float(canon[3:])


def log_period(name):
    """Natural log of :func:`im_period` [ln s]."""
    return math.log(im_period(name))
