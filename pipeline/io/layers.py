"""Layers of the ``[programme]`` config section: the declared constraint and its checks.

Occurrence layers ``{ id, attachment, limit, reinstatements }`` and aggregate layers
``{ id, attachment, limit }`` (amounts in the run's currency; ``limit = "none"``:
unlimited; ``reinstatements = "unlimited"``, the default: no annual cap).  The config
reader (:mod:`quakefolio.pipeline.io.config`) adds file, line and key to the messages.
"""
from __future__ import annotations

import math

from quakefolio.core.errors import did_you_mean
from quakefolio.core.events.programme import Layer
from quakefolio.core.validation import Constraint, Invalid, Pattern

__all__ = ["Layers", "LAYER_KEYS", "layers_of"]


class Layers(Constraint):
    """Programme layers (``"occurrence"`` or ``"aggregate"``), checked by :func:`_layers`."""

    def __init__(self, kind):
        super().__init__()
        self.kind = kind

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
        """The checked layers (:func:`_layers`).

        Parameters
        ----------
        value : object
            The parsed TOML value.
        context : dict
            Unused (the config reader's context).

        Returns
        -------
        list of dict
        """
        return _layers(self.kind, value)


#: Keys of one layer table of ``[programme]``, per kind (``reinstatements``: occurrence layers only).
LAYER_KEYS = {"occurrence": ("id", "attachment", "limit", "reinstatements"),
              "aggregate": ("id", "attachment", "limit")}
_LAYER_ID = Pattern(r"^[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}$")


def _amount(value):
    return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)


def _layer(kind, i, entry):
    """One layer table -> ``{id, attachment, limit, reinstatements}`` (limit None: unlimited)."""
    keys = LAYER_KEYS[kind]
    where = f"layer {i + 1}"
    for key in entry:
        if key not in keys:
            hint = did_you_mean(key, keys, cutoff=0.5, otherwise="; valid: " + ", ".join(keys))
            raise Invalid(f"{where}: unknown key '{key}'{hint}")
    lid = entry.get("id")
    if not isinstance(lid, str) or not _LAYER_ID.holds(lid):
        raise Invalid(f"{where}: 'id' must be 1-64 letters, digits, '-', '_' or '.', got {lid!r}")
    where = f"layer {lid!r}"
    att, lim = entry.get("attachment"), entry.get("limit")
    if not _amount(att) or att < 0:
        raise Invalid(f"{where}: 'attachment' must be a number >= 0 [currency], got {att!r}")
    if lim != "none" and (not _amount(lim) or lim <= 0):
        raise Invalid(f"{where}: 'limit' must be a positive number [currency] or \"none\", got {lim!r}")
    out = {"id": lid, "attachment": float(att), "limit": None if lim == "none" else float(lim)}
    if kind == "occurrence":
        rein = entry.get("reinstatements", "unlimited")
        if rein != "unlimited" and (isinstance(rein, bool) or not isinstance(rein, int) or rein < 0):
            raise Invalid(f"{where}: 'reinstatements' must be an integer >= 0 or \"unlimited\", got {rein!r}")
        out["reinstatements"] = None if rein == "unlimited" else int(rein)
    return out


def _layers(kind, value):
    """Programme layers of one kind: a list of tables with unique ids.

    Parameters
    ----------
    kind : {"occurrence", "aggregate"}
    value : object
        The parsed TOML value.

    Returns
    -------
    list of dict
        ``{"id", "attachment" [currency], "limit" [currency] or None (unlimited)}`` and, for
        occurrence layers, ``"reinstatements"`` (int, or None for unlimited; default unlimited).

    Raises
    ------
    quakefolio.core.validation.Invalid
        With the message; the caller adds file, line and key.
    """
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise Invalid(f"expected a list of tables like {{ id = \"L1\", attachment = ..., limit = ... }}")
    out = [_layer(kind, i, entry) for i, entry in enumerate(value)]
    ids = [layer["id"] for layer in out]
    if len(set(ids)) != len(ids):
        raise Invalid(f"layer ids must be unique, got {ids}")
    return out


def layers_of(settings):
    """The :class:`~quakefolio.core.events.programme.Layer` objects of ``[programme]``, occurrence first.

    Parameters
    ----------
    settings : quakefolio.pipeline.io.config.ProgrammeSettings

    Returns
    -------
    list of Layer
        Unlimited limits as ``inf``.
    """
    out = []
    for kind, entries in (("occurrence", settings.occurrence_layers), ("aggregate", settings.aggregate_layers)):
        for e in entries:
            out.append(Layer(e["id"], kind, float(e["attachment"]),
                             float("inf") if e["limit"] is None else float(e["limit"]), e.get("reinstatements")))
    return out
