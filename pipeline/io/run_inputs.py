"""The inputs a run used, stored with it: its assets and its fragility classes.

A run folder describes itself: besides its results it holds

``run_assets``
    the validated exposure as used (one row per asset, in exposure order);
``run_fragility``
    the fragility and consequence model of every building class the run used, long form
    (one row per class and damage state, in severity order).

The report and the change report read these tables instead of the user's input files,
which may have changed or gone since the run.  :func:`run_input_frames` builds them;
:func:`library_from_frame` turns ``run_fragility`` back into a
:class:`~quakefolio.fragility.models.FragilityLibrary` with the same values, bit for bit.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from quakefolio.fragility.models import DamageStateSet, FragilityLibrary, VulnerabilityFunction

__all__ = ["run_input_frames", "library_from_frame", "new_class_frame", "ASSET_COLUMNS", "FRAGILITY_COLUMNS", "VULNERABILITY_COLUMNS"]

#: Columns of ``run_assets`` (the exposure contract), in order.
ASSET_COLUMNS = ("asset_id", "lon", "lat", "building_class", "replacement_value", "vs30_mps", "occupants",
                 "deductible", "limit", "contents_value", "interruption_value_per_day")

#: Columns of ``run_fragility``, in order.
FRAGILITY_COLUMNS = ("building_class", "description", "im", "damage_state", "damage_state_index", "n_states",
                     "median", "beta", "mean_damage_ratio", "cov", "downtime_days", "casualty_rate",
                     "is_collapse_state", "contents_damage_ratio")


#: Columns of ``run_vulnerability`` (classes given by a vulnerability table), in order.
VULNERABILITY_COLUMNS = ("building_class", "description", "im", "row_index", "im_level", "mean_loss_ratio", "cov")


def _vulnerability_frame(library, classes):
    """Long-form tables of the vulnerability classes among ``classes`` (one row per class and level)."""
    rows = {c: [] for c in VULNERABILITY_COLUMNS}
    for code in classes:
        vf = library[code]
        if vf.has_damage_states:
            continue
        for i in range(len(vf.levels)):
            for col, v in zip(VULNERABILITY_COLUMNS, (code, vf.description, vf.im, i, vf.levels[i],
                                                      vf.mean_loss_ratio[i], vf.cov[i])):
                rows[col].append(v)
    out = pd.DataFrame({c: pd.Series(rows[c], dtype=object) for c in VULNERABILITY_COLUMNS[:3]})
    out["row_index"] = np.asarray(rows["row_index"], dtype=np.int32)
    for col in VULNERABILITY_COLUMNS[4:]:
        out[col] = np.asarray(rows[col], dtype=float)
    return out


def _asset_frame(exposure, extra_columns=()):
    """The exposure contract's columns of a validated exposure frame (missing optional ones as NaN), then the
    ``extra_columns`` (text) the run breaks its results down by."""
    out = pd.DataFrame({"asset_id": exposure["asset_id"].astype(str).array})  # text stays in Arrow
    for col in ASSET_COLUMNS[1:]:
        if col == "building_class":
            out[col] = exposure[col].astype(str).array
        elif col in exposure.columns:
            out[col] = exposure[col].to_numpy(dtype=float)
        else:
            out[col] = np.nan
    for col in extra_columns:
        if col not in out.columns:
            out[col] = exposure[col].astype(str).array
    return out


def _fragility_frame(library, classes):
    """Long-form parameters of ``classes`` of ``library`` (one row per class and damage state)."""
    rows = {c: [] for c in FRAGILITY_COLUMNS}
    for code in classes:
        dss = library[code]
        for j, name in enumerate(dss.names):
            values = (code, dss.description, dss.im, name, j, dss.n_states, dss.medians[j], dss.betas[j],
                      dss.mean_damage_ratio[j], dss.cov[j], dss.downtime_days[j], dss.casualty_rate[j],
                      j == dss.collapse_index, dss.contents_damage_ratio[j])
            for col, v in zip(FRAGILITY_COLUMNS, values):
                rows[col].append(v)
    out = pd.DataFrame({c: pd.Series(rows[c], dtype=object) for c in FRAGILITY_COLUMNS[:4]})
    out["damage_state_index"] = np.asarray(rows["damage_state_index"], dtype=np.int32)
    out["n_states"] = np.asarray(rows["n_states"], dtype=np.int32)
    for col in FRAGILITY_COLUMNS[6:12]:
        out[col] = np.asarray(rows[col], dtype=float)
    out["is_collapse_state"] = np.asarray(rows["is_collapse_state"], dtype=bool)
    out["contents_damage_ratio"] = np.asarray(rows["contents_damage_ratio"], dtype=float)
    return out


def run_input_frames(exposure, library, classes=None, extra_columns=()):
    """The ``run_assets`` and ``run_fragility`` tables of a run.

    Parameters
    ----------
    exposure : pandas.DataFrame
        The validated exposure (``quakefolio.pipeline.io.ingest.read_exposure``): columns
        ``asset_id``, ``lon``, ``lat`` [deg, WGS84], ``building_class``,
        ``replacement_value`` [currency], optional ``vs30_mps`` [m/s], ``occupants`` [-],
        ``deductible``, ``limit`` [currency], ``contents_value`` [currency],
        ``interruption_value_per_day`` [currency/day]; other columns are left out.
    library : FragilityLibrary
        The fragility library the run loaded.
    classes : iterable of str, optional
        The building classes the run used; default: every class of the exposure, sorted.
    extra_columns : sequence of str
        Exposure columns kept after the contract's (``[output] breakdown_columns``), as text.

    Returns
    -------
    dict
        ``{"run_assets": DataFrame (n_assets rows), "run_fragility": DataFrame
        (sum of the classes' damage-state counts rows)}``, and ``"run_vulnerability"`` (one row
        per level of each class given by a vulnerability table) when there is such a class;
        values are copied unchanged
        (float64), so :func:`library_from_frame` restores the classes exactly.
    """
    if classes is None:
        classes = sorted(set(exposure["building_class"].astype(str).unique()))
    out = {"run_assets": _asset_frame(exposure, extra_columns),
           "run_fragility": _fragility_frame(library, list(classes))}
    vulnerability = _vulnerability_frame(library, list(classes))
    if len(vulnerability):  # only runs that use a vulnerability class have the table
        out["run_vulnerability"] = vulnerability
    return out


def new_class_frame(classes):
    """The ``whatif_fragility`` table: the parameters of each retrofit alternative's new class.

    Parameters
    ----------
    classes : sequence of (str, str, DamageStateSet)
        Per alternative: its id, the new class code and the class's damage states (a class
        given by a vulnerability table has none and is left out).

    Returns
    -------
    pandas.DataFrame
        ``alternative_id`` then the columns of :data:`FRAGILITY_COLUMNS` (``median`` [IM
        units, g], ``beta`` [-], ...), one row per alternative and damage state, in severity
        order; :func:`library_from_frame` of one alternative's rows restores its class.
    """
    parts = []
    for alt_id, code, dss in classes:
        if not getattr(dss, "has_damage_states", True):
            continue
        part = _fragility_frame({code: dss}, [code])
        part.insert(0, "alternative_id", pd.Series([alt_id] * len(part), dtype=object))
        parts.append(part)
    if not parts:
        empty = _fragility_frame({}, [])
        empty.insert(0, "alternative_id", pd.Series([], dtype=object))
        return empty
    return pd.concat(parts, ignore_index=True)


def library_from_frame(frame, vulnerability=None):
    """A FragilityLibrary from a ``run_fragility`` table (and ``run_vulnerability``, if any).

    Parameters
    ----------
    vulnerability : pandas.DataFrame, optional
        Columns :data:`VULNERABILITY_COLUMNS`, one row per class and level (``im_level``
        [IM units, g], ``mean_loss_ratio`` [-], ``cov`` [-]).
    frame : pandas.DataFrame
        Columns :data:`FRAGILITY_COLUMNS`; one row per class and damage state
        (``median`` [IM units, g], ``beta`` [-], ``mean_damage_ratio`` [-], ``cov`` [-],
        ``downtime_days`` [days], ``casualty_rate`` [-], ``contents_damage_ratio`` [-], absent
        in runs written before it existed).

    Returns
    -------
    FragilityLibrary
        One :class:`DamageStateSet` per class, states ordered by ``damage_state_index``;
        ``path`` and ``sha256`` are None (the classes come from the run, not a file).
    """
    classes = {}
    for code, g in frame.groupby("building_class", sort=True):
        g = g.sort_values("damage_state_index", kind="stable")
        collapse = np.flatnonzero(g.is_collapse_state.to_numpy(dtype=bool))
        description = g.description.iloc[0]
        classes[str(code)] = DamageStateSet(
            class_code=str(code), im=str(g.im.iloc[0]), names=tuple(str(n) for n in g.damage_state),
            medians=g["median"].to_numpy(float), betas=g.beta.to_numpy(float),
            mean_damage_ratio=g.mean_damage_ratio.to_numpy(float), cov=g["cov"].to_numpy(float),
            downtime_days=g.downtime_days.to_numpy(float), casualty_rate=g.casualty_rate.to_numpy(float),
            collapse_index=int(collapse[0]) if len(collapse) else -1,
            contents_damage_ratio=(g.contents_damage_ratio.to_numpy(float) if "contents_damage_ratio" in g
                                   else None),
            description="" if description is None or description != description else str(description))
    for code, g in ([] if vulnerability is None else vulnerability.groupby("building_class", sort=True)):
        g = g.sort_values("row_index", kind="stable")
        description = g.description.iloc[0]
        classes[str(code)] = VulnerabilityFunction(
            class_code=str(code), im=str(g.im.iloc[0]), levels=g.im_level.to_numpy(float),
            mean_loss_ratio=g.mean_loss_ratio.to_numpy(float), cov=g["cov"].to_numpy(float),
            description="" if description is None or description != description else str(description))
    return FragilityLibrary(classes=dict(sorted(classes.items())))
