"""Time-of-day occupancy of ``[exposure] occupancy_periods``: the declared constraint and its checks.

Periods ``{ name, hours, present }`` whose hours sum to 24; ``present`` is the share of a
building's occupants inside it during the period.  The config reader
(:mod:`quakefolio.pipeline.io.config`) adds file, line and key to the messages.
"""
from __future__ import annotations

from quakefolio.core.errors import did_you_mean
from quakefolio.core.validation import Constraint, Invalid

__all__ = ["OccupancyPeriods", "OCCUPANCY_PERIOD_KEYS", "occupancy_periods"]


class OccupancyPeriods(Constraint):
    """Periods of the day ``{name, hours, present}``, checked by :func:`occupancy_periods`."""

    def holds(self, value):
        """Always true: the checks run in :meth:`convert`, which words each problem.

        Parameters
        ----------
        value : object
            The parsed TOML value.

        Returns
        -------
        bool
        """
        return True

    def convert(self, value, context):
        """The checked periods (:func:`occupancy_periods`).

        Parameters
        ----------
        value : object
            The parsed TOML value.
        context : dict
            Validation context (unused).

        Returns
        -------
        list of dict
        """
        return occupancy_periods(value)


#: Keys of one entry of ``[exposure] occupancy_periods``.
OCCUPANCY_PERIOD_KEYS = ("name", "hours", "present")


def occupancy_periods(value):
    """Time-of-day occupancy: a list of ``{name, hours, present}``; hours sum to 24, present in [0, 1].

    Parameters
    ----------
    value : object
        The parsed TOML value.

    Returns
    -------
    list of dict
        ``{"name": str, "hours": float [h], "present": float [-]}`` per period, in the given order.

    Raises
    ------
    quakefolio.core.validation.Invalid
        With the message; the caller adds file, line and key.
    """
    if not isinstance(value, list) or not value or not all(isinstance(v, dict) for v in value):
        raise Invalid("expected a list of tables like { name = \"day\", hours = 10, present = 0.9 }")
    out = []
    for i, entry in enumerate(value):
        for key in entry:
            if key not in OCCUPANCY_PERIOD_KEYS:
                hint = did_you_mean(key, OCCUPANCY_PERIOD_KEYS, cutoff=0.5,
                                    otherwise=f"; valid: {', '.join(OCCUPANCY_PERIOD_KEYS)}")
                raise Invalid(f"period {i + 1}: unknown key '{key}'{hint}")
        name, hours, present = entry.get("name"), entry.get("hours"), entry.get("present")
        if not isinstance(name, str) or not name.strip():
            raise Invalid(f"period {i + 1}: 'name' must be a non-empty string")
        if isinstance(hours, bool) or not isinstance(hours, (int, float)) or not 0 < hours <= 24:
            raise Invalid(f"period {i + 1}: 'hours' must be a number of hours in (0, 24], got {hours!r}")
        if isinstance(present, bool) or not isinstance(present, (int, float)) or not 0 <= present <= 1:
            raise Invalid(f"period {i + 1}: 'present' must be a fraction of occupants in [0, 1], got {present!r}")
        out.append({"name": name, "hours": float(hours), "present": float(present)})
    total = sum(p["hours"] for p in out)
    if abs(total - 24.0) > 1e-9:
        raise Invalid(f"period hours must sum to 24, got {total:.6g}")
    names = [p["name"] for p in out]
    if len(set(names)) != len(names):
        raise Invalid(f"period names must be unique, got {names}")
    return out
