"""The hazard-site table of a run: where each hazard site lies, its site condition and its assets."""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["hazard_sites_table", "source_faults_table"]


def hazard_sites_table(inputs):
    """One row per hazard site: id, position, Vs30 (compute mode) and the assets mapped to it.

    Parameters
    ----------
    inputs : quakefolio.pipeline.stages.products.RunInputs
        Validated inputs (hazard sites and the asset-to-site mapping).

    Returns
    -------
    pandas.DataFrame
        ``site_id``, ``lon`` and ``lat`` [deg, WGS84], in compute mode ``vs30_mps`` [m/s]
        (the site condition the ground-motion models used) and
        ``n_assets_default_vs30`` (assets of the site without their own ``vs30_mps``, given
        ``[hazard] default_vs30_mps``), then ``n_assets`` (assets mapped to the site) and
        ``max_asset_distance_km`` [km] (farthest asset of the site; 0 for a site without
        assets).  Sites in the order of the hazard.
    """
    hz = inputs.hazard
    n_sites = len(hz.site_id)
    index = np.asarray(inputs.site_index, dtype=np.int64)
    frame = {"site_id": np.asarray(hz.site_id).astype(str), "lon": np.asarray(hz.lon, dtype=float),
             "lat": np.asarray(hz.lat, dtype=float)}
    if inputs.hazard_model is not None:
        own = inputs.exposure.vs30_mps.to_numpy(dtype=float)
        frame["vs30_mps"] = np.asarray(inputs.hazard_model.site_vs30, dtype=float)
        frame["n_assets_default_vs30"] = np.bincount(index[np.isnan(own)], minlength=n_sites).astype(np.int64)
    frame["n_assets"] = np.bincount(index, minlength=n_sites).astype(np.int64)
    farthest = np.zeros(n_sites)
    np.maximum.at(farthest, index, np.asarray(inputs.site_distance_km, dtype=float))
    frame["max_asset_distance_km"] = farthest
    return pd.DataFrame(frame)


def source_faults_table(model):
    """The fault traces of the run's source models, one row per trace point (for maps).

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
        Computed-hazard model with its ``source_branches`` (each a
        :class:`~quakefolio.pipeline.io.source_model.SourceModel` with ``traces``).

    Returns
    -------
    pandas.DataFrame
        ``source_branch``, ``source_id``, ``region`` (tectonic region), ``point_index`` (0-based,
        along the trace as given), ``lon`` and ``lat`` [deg, WGS84]: every fault of every
        source-model branch (a fault shared by branches appears once per branch).  Areas and
        points are not listed.
    """
    rows = [(bid, sid, region, k, lon, lat)
            for bid, _weight, src in model.source_branches
            for sid, region, trace in getattr(src, "traces", ())
            for k, (lon, lat) in enumerate(trace)]
    columns = ["source_branch", "source_id", "region", "point_index", "lon", "lat"]
    frame = pd.DataFrame(rows, columns=columns)
    return frame.astype({"source_branch": str, "source_id": str, "region": str, "point_index": np.int64,
                         "lon": float, "lat": float})
