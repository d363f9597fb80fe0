"""Hazard stage in compute mode: sites from the exposure, source-model and ground-motion
logic tree, curves per block of sites, weighted mean and fractiles, disaggregation.

Numerics live in :mod:`quakefolio.core.hazard`; this module prepares inputs, cuts work
into site blocks (the unit of a flow task) and lays results out as tables.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field, replace
from typing import Mapping

import numpy as np
import pandas as pd

from quakefolio.core.combinations import (
    combination_fractiles, end_branch_curves, part_columns, part_layout, tree_combinations,
)
from quakefolio.core.curves import im_at_rate
from quakefolio.core.gmm import get_gmm
from quakefolio.core.hazard import (
    DISAGG_MOMENTS, DisaggBins, compute_disaggregation, compute_site_hazard, disaggregation_summary,
    weighted_mean,
)
from quakefolio.core.ims import im_period
from quakefolio.core.sites import exact_sites, grid_reference, snap_sites
from quakefolio.pipeline.io.cache import digest
from quakefolio.pipeline.io.ingest import HazardCurves
from quakefolio.pipeline.stages.checks import LibraryLines, check_class_hazard, model_periods
from quakefolio.pipeline.stages.products import SiteBlockResult, frozen_mapping
from quakefolio.pipeline.stages.regions import check_source_regions, region_model_branches, site_inputs
from quakefolio.pipeline.io.source_model import count_source_model, load_source_model
from quakefolio.pipeline.stages.sizes import check_hazard_work, rupture_limit

__all__ = ["HazardModel", "GroundMotionMemo", "GROUND_MOTION_MEMO", "prepare_compute", "site_blocks", "hazard_block", "combine_hazard", "with_part_curves",
           "disagg_block", "combine_disaggregation", "statistic_name", "branch_weights",
           "site_hazard_table", "hazard_at_return_periods_table"]


def statistic_name(q):
    """Column label of a fractile: 0.16 -> 'p16', 0.025 -> 'p2.5'.

    Parameters
    ----------
    q : float
        Fractile in (0, 1) [-].

    Returns
    -------
    str
        ``"p"`` followed by the percentage in ``%g`` format.
    """
    return f"p{100 * q:g}"


@dataclass(frozen=True)
class HazardModel:
    """The compute-mode hazard model, validated, and (after the hazard stage) its results.

    Attributes
    ----------
    source_branches : tuple of (id, weight, SourceModel)
    gmm_branches : tuple of (id, weight, ground-motion model)
    ims : list of str
        IMs computed (configured ones, those the fragility classes need and the conditioning IMs
        of the conditional mean spectrum), by period.
    levels_g : ndarray (n_levels,) [g]
        IM levels of every curve.
    truncation_sigma : float or None
        Symmetric truncation of ground-motion residuals [sigma].
    max_distance_km : float
        Integration distance [km].
    region : str
        Ground-motion model region.
    fractiles : list of float
        Logic-tree fractiles reported besides the mean [-].
    disaggregation : bool
        Whether the run disaggregates.
    site_vs30 : ndarray (n_sites,) [m/s]
    ref : tuple (lon, lat) [deg]
        Reference point of the local projection.
    branch_curves : ndarray (n_src, n_gmm, n_im, n_sites, n_levels) [1/yr] or None
        Curves of every (source branch, active-crustal model) end branch with the other
        regions at their weighted mean, once computed
        (:func:`quakefolio.core.combinations.end_branch_curves`); the mean and the event
        stage use them.
    part_curves : ndarray (n_src, n_columns, n_im, n_sites, n_levels) [1/yr] or None
        Curves of every (source branch, region, model) on the part axis of ``parts``,
        once computed.
    parts : quakefolio.core.combinations.PartLayout
        The part axis: the active-crustal models, then each other region's models.
    combinations : quakefolio.core.combinations.Combinations
        The end branches of the fractiles and of ``propagate_branches``: every combination of
        one source branch and one model per region, or a seeded sample above
        ``[hazard] fractile_combinations_max``.
    statistics : Mapping name -> ndarray (n_im, n_sites, n_levels) [1/yr]
        ``mean`` and fractiles (``p16`` ...) over ``combinations``, once computed.
    disagg : ndarray (n_im, n_sites, n_rp, n_mag, n_dist, n_eps) [1/yr] or None
        Disaggregation, once computed.
    disagg_moments : ndarray (n_im, n_sites, n_rp, 5) or None
        Exact rate-weighted sums over (site, rupture) pairs for the mean magnitude,
        distance and epsilon (:data:`quakefolio.core.hazard.DISAGG_MOMENTS`), once computed.
    spectrum_sums, spectrum_moments : ndarray or None
        Conditional mean spectrum: weighted sums (n_cond, n_sites, n_rp, 2, n_periods) and
        disaggregation moments (n_cond, n_sites, n_rp, 5) at each target, once computed
        (:mod:`quakefolio.pipeline.stages.spectrum`).
    bins : DisaggBins
    digest : str
        Content digest of everything a site's hazard depends on except the site.
    region_branches : Mapping region -> tuple of (id, weight, ground-motion model)
        Branches of the tectonic regions other than active crustal present in the sources
        (:mod:`quakefolio.pipeline.stages.regions`).
    site_fields : Mapping name -> ndarray (n_sites,)
        Per-site model inputs (``z1p0_km``, ``z2p5_km`` [km], ``backarc``); empty when none
        applies (:func:`quakefolio.pipeline.stages.regions.site_inputs`).
    reuse_ground_motion : bool
        The hazard blocks keep their per-pair ground-motion values (:data:`GROUND_MOTION_MEMO`)
        for the disaggregation or the conditional mean spectrum of the run.
    """

    source_branches: tuple
    gmm_branches: tuple
    ims: list
    levels_g: np.ndarray
    truncation_sigma: float | None
    max_distance_km: float
    region: str
    fractiles: list
    disaggregation: bool
    site_vs30: np.ndarray
    ref: tuple
    branch_curves: np.ndarray | None = None
    statistics: Mapping = field(default_factory=lambda: frozen_mapping({}))
    disagg: np.ndarray | None = None
    bins: DisaggBins = field(default_factory=DisaggBins.default)
    digest: str = ""
    disagg_moments: np.ndarray | None = None
    spectrum_sums: np.ndarray | None = None
    spectrum_moments: np.ndarray | None = None
    region_branches: Mapping = field(default_factory=lambda: frozen_mapping({}))
    site_fields: Mapping = field(default_factory=lambda: frozen_mapping({}))
    reuse_ground_motion: bool = False
    part_curves: np.ndarray | None = None
    parts: object = None
    combinations: object = None


class GroundMotionMemo:
    """Per-pair ground-motion values of the hazard curves, kept in this process for the disaggregation
    and the conditional mean spectrum of the same site blocks (up to ``max_bytes``).

    Keys are :func:`quakefolio.core.hazard.values_key` tuples whose first part is
    :func:`memo_key` (the content keys of the block's sites and the source branch), so a
    value is only found for the same sites, ruptures, models and IMs.  New values are kept
    while they fit, never evicted (blocks are visited in the same order by every stage);
    a value not found is evaluated again, with the same numbers.  Thread-safe.
    """

    def __init__(self, max_bytes):
        self.max_bytes = int(max_bytes)
        self._values = {}
        self._bytes = 0
        self._lock = threading.Lock()

    def get(self, key):
        """The values kept under a key.

        Parameters
        ----------
        key : tuple
            :func:`quakefolio.core.hazard.values_key`.

        Returns
        -------
        (ndarray, ndarray) or None
            Ln median [ln g] and sigma [ln units] (n_ims, n_pairs); None where not kept.
        """
        return self._values.get(key)

    def __setitem__(self, key, values):
        size = sum(int(v.nbytes) for v in values)
        with self._lock:
            if key not in self._values and self._bytes + size <= self.max_bytes:
                for v in values:  # shared by the stages that read them: never written
                    v.flags.writeable = False
                self._values[key] = values
                self._bytes += size

    @property
    def nbytes(self):
        """Bytes of the values kept."""
        return self._bytes

    def clear(self):
        """Forget every value."""
        with self._lock:
            self._values.clear()
            self._bytes = 0


#: Bytes of ground-motion values kept between the hazard, disaggregation and spectrum stages
#: (the demo needs about 200 MB; a larger run recomputes the blocks that do not fit).
MEMO_BYTES = 512 * 2 ** 20
#: The process's memo: filled by :func:`hazard_block`, read by :func:`disagg_block` and
#: :func:`quakefolio.pipeline.stages.spectrum.spectrum_block`, cleared by the runner after them.
GROUND_MOTION_MEMO = GroundMotionMemo(MEMO_BYTES)


def memo_key(site_keys, source_index):
    """Key prefix of a source branch's ground-motion values on a set of sites.

    Parameters
    ----------
    site_keys : sequence of str
        Content digests of the sites (model, position, Vs30, site inputs).
    source_index : int
        The source branch.

    Returns
    -------
    tuple
    """
    return tuple(site_keys), int(source_index)


def build_sites(exposure, spacing_km, default_vs30):
    """Hazard sites from asset locations.

    With ``spacing_km = 0`` every unique (location, Vs30) of the exposure is a site.
    With ``spacing_km > 0`` asset positions are snapped to the nodes of a square grid of
    that spacing in a local azimuthal-equidistant projection about the portfolio's mean
    position; the assets of one node share a site whose Vs30 is the geometric mean of
    theirs (common practice for gridded portfolio hazard: one site condition per cell).
    Assets without ``vs30_mps`` use ``default_vs30``.

    Numerics: :mod:`quakefolio.core.sites`.

    Parameters
    ----------
    exposure : DataFrame
        With ``lon``, ``lat`` [deg] and ``vs30_mps`` [m/s] (NaN: none).
    spacing_km : float [km]
        Grid spacing; 0 for one site per distinct (location, Vs30).
    default_vs30 : float [m/s]

    Returns
    -------
    ids : ndarray of str, shape (n_sites,)
    lon, lat : ndarray, shape (n_sites,) [deg]
    vs30 : ndarray, shape (n_sites,) [m/s]
    site_index : ndarray of int, shape (n_assets,)
    distance_km : ndarray, shape (n_assets,) [km]
    ref : (lon, lat) [deg]
        Projection reference point.
    """
    lon = exposure.lon.to_numpy()
    lat = exposure.lat.to_numpy()
    vs30 = exposure.vs30_mps.to_numpy(dtype=float)
    vs30 = np.where(np.isnan(vs30), default_vs30, vs30)
    ref = grid_reference(lon, lat)
    if spacing_km > 0:
        site_lon, site_lat, site_vs30, site_index, dist = snap_sites(lon, lat, vs30, spacing_km, ref)
    else:
        site_lon, site_lat, site_vs30, site_index, dist = exact_sites(lon, lat, vs30)
    width = max(4, len(str(len(site_lon))))
    ids = np.array([f"H{i + 1:0{width}d}" for i in range(len(site_lon))])
    return ids, site_lon, site_lat, site_vs30, site_index, dist, ref


def prepare_compute(config, exposure, library, lines=None, budget=None):
    """Validate the compute-mode inputs and build the sites (no hazard computed yet).

    Reads every source-model branch, resolves the ground-motion model branches, adds the
    IMs the exposure's fragility classes need and the conditioning IMs of the conditional mean
    spectrum to the configured ones (sorted by period),
    checks that every ground-motion model covers those periods and builds the sites
    (:func:`build_sites`).  The class check is
    :func:`quakefolio.pipeline.stages.checks.check_class_hazard`.

    Parameters
    ----------
    config : quakefolio.pipeline.io.config.Config
        The run configuration (``[hazard]`` in compute mode).
    exposure : pandas.DataFrame
        Validated exposure (:func:`quakefolio.pipeline.io.ingest.read_exposure`).
    library : quakefolio.fragility.FragilityLibrary
        The fragility classes.
    lines : quakefolio.pipeline.stages.checks.LibraryLines, optional
        Line locator of the library files (a new one if not given).
    budget : quakefolio.pipeline.stages.sizes.Budget, optional
        Memory budget: a source model whose rupture count cannot fit it is refused before
        its ruptures are built (:func:`quakefolio.pipeline.stages.sizes.rupture_limit`).

    Returns
    -------
    model : HazardModel
        Without curves; ``digest`` covers the branches, IMs, levels and settings.
    hazard : HazardCurves
        The sites with empty ``curves``.
    site_index : ndarray of int, shape (n_assets,)
        Site of every asset.
    site_distance_km : ndarray, shape (n_assets,) [km]
        Asset-to-site distance.

    Raises
    ------
    InputError
        When a class's IM lies outside a ground-motion model's periods (naming the
        library file and the class), or a source model is invalid.
    """
    hz = config.hazard
    used = sorted(set(exposure.building_class.unique()))
    needed = {library[c].im for c in used}
    ims = sorted(set(hz.ims) | needed | set(hz.cms_conditioning_ims), key=im_period)
    ids, lon, lat, vs30, site_index, dist, ref = build_sites(exposure, hz.site_spacing_km, hz.default_vs30_mps)
    if budget is not None:  # count first: what cannot fit is refused before any rupture is built
        limit = rupture_limit(config, len(ims), budget)
        counts = [count_source_model(branch["file"], limit) for branch in hz.source_models]
        check_hazard_work(config, counts, len(ids), len(ims), budget)
    sources = []
    for branch in hz.source_models:
        sources.append((branch["id"], branch["weight"], load_source_model(branch["file"])))
    gmms = [(b["id"], b["weight"], get_gmm(b["model"])) for b in hz.gmm_branches]
    regions = check_source_regions(config, sources)
    others = {r: b for r, b in region_model_branches(hz).items() if r in regions}
    fields = site_inputs(exposure, site_index, len(ids), hz.site_backarc)
    if not any(r.startswith("subduction") for r in regions):
        fields.pop("backarc")
    lines = lines or LibraryLines()
    every = gmms + [g for rows in others.values() for g in rows]
    for code in used:
        check_class_hazard(library[code], model_periods(every), config.fragility.library, lines, reject_crossing=False)
    levels = np.asarray(hz.im_levels_g, dtype=float)
    model_digest = digest(
        "hazard-model", [(bid, w, src.sha256) for bid, w, src in sources], [(g, w) for g, w, _ in gmms], ims,
        levels, hz.truncation_sigma, hz.integration_distance_km, hz.region, list(ref),
        *([sorted((r, [(g, w) for g, w, _ in rows]) for r, rows in others.items())] if others else []))
    parts, combos = _end_branches(config, sources, gmms, others)
    model = HazardModel(tuple(sources), tuple(gmms), ims, levels, hz.truncation_sigma, hz.integration_distance_km,
                        hz.region, list(hz.fractiles), hz.disaggregation, vs30, ref, digest=model_digest,
                        region_branches=frozen_mapping(others), site_fields=frozen_mapping(fields),
                        reuse_ground_motion=bool(hz.disaggregation or hz.cms_conditioning_ims), parts=parts,
                        combinations=combos)
    hazard = HazardCurves(site_id=ids, lon=lon, lat=lat, curves={}, source="computed", interpolated=frozenset())
    return model, hazard, site_index, dist


def _end_branches(config, sources, gmms, others):
    """The part axis and the combinations of the fractiles (:mod:`quakefolio.core.combinations`)."""
    parts = part_layout([w for _, w, _ in gmms], {r: [w for _, w, _ in rows] for r, rows in others.items()})
    combos = tree_combinations([w for _, w, _ in sources], [src.ruptures.regions for _, _, src in sources], parts,
                               config.hazard.fractile_combinations_max, config.portfolio.seed)
    return parts, combos


def site_blocks(n_sites, size):
    """Site slices of at most ``size`` sites (the unit of a hazard task).

    Parameters
    ----------
    n_sites : int
    size : int
        ``[execution] site_block_size``.

    Returns
    -------
    list of (lo, hi)
    """
    return [(lo, min(n_sites, lo + size)) for lo in range(0, n_sites, size)]


def _site_keys(model, hazard, lo, hi, *extra):
    names = sorted(model.site_fields)
    return [digest("hazard-site", model.digest, float(hazard.lon[i]), float(hazard.lat[i]),
                   float(model.site_vs30[i]), *extra, *[(n, float(model.site_fields[n][i])) for n in names])
            for i in range(lo, hi)]


def _region_kwargs(model, idx):
    """Keywords of the core engine for the regions' branches and the site inputs of sites ``idx``."""
    return dict(region_branches={r: [(w, g) for _, w, g in rows] for r, rows in model.region_branches.items()},
                site_fields={n: v[idx] for n, v in model.site_fields.items()} or None)


def _memo(model):
    """The process's ground-motion memo (:data:`GROUND_MOTION_MEMO`), or None for a run without
    disaggregation or conditional mean spectrum (nothing would read the values)."""
    return GROUND_MOTION_MEMO if model.reuse_ground_motion else None


def _cached_rows(cache, stage, keys, shape, name, *also):
    """Rows of ``keys`` found in the cache (filled into a zero array of ``shape``) and the missing row numbers.

    ``also``: further ``(name, shape)`` entries of the same cache entries, returned as
    further arrays after the first (an entry lacking one of them counts as missing).
    """
    wanted = [(name, shape), *also]
    outs = [np.zeros(sh) for _, sh in wanted]
    missing = []
    for j, key in enumerate(keys):
        hit = cache.get(stage, key) if cache is not None else None
        if hit is not None and all(n in hit and hit[n].shape == o[j].shape for (n, _), o in zip(wanted, outs)):
            for (n, _), o in zip(wanted, outs):
                o[j] = hit[n]
        else:
            missing.append(j)
    return (*outs, missing)


def hazard_block(model, hazard, block, cache=None):
    """Curves of every (source branch, region, model) for one block of sites.

    Sites whose content key is in the cache are read from it; the others are computed
    with :func:`quakefolio.core.hazard.compute_site_hazard` (per-site results do not
    depend on the other sites of the block).

    Parameters
    ----------
    model : HazardModel
    hazard : HazardCurves
        The hazard sites (lon, lat [deg]).
    block : tuple (lo, hi)
        Site slice.
    cache : quakefolio.pipeline.io.cache.StageCache or None

    Returns
    -------
    SiteBlockResult
        ``values`` (n_src, n_columns, n_im, n_block_sites, n_levels) [1/yr]: the part
        curves (:func:`quakefolio.core.combinations.part_columns` of
        :func:`~quakefolio.core.hazard.compute_site_hazard` with ``by_region``).
    """
    lo, hi = block
    keys = _site_keys(model, hazard, lo, hi)
    per_site = (len(model.source_branches), model.parts.n_columns, len(model.ims), len(model.levels_g))
    rows, missing = _cached_rows(cache, "hazard", keys, (hi - lo,) + per_site, "parts")
    out = np.ascontiguousarray(np.moveaxis(rows, 0, 3))
    if missing:
        idx = lo + np.array(missing)
        computed = [keys[j] for j in missing]
        for s_i, (_, _, src) in enumerate(model.source_branches):
            by_region = compute_site_hazard(
                hazard.lon[idx], hazard.lat[idx], model.site_vs30[idx], src.ruptures,
                [g for _, _, g in model.gmm_branches], model.ims, model.levels_g,
                truncation_sigma=model.truncation_sigma, max_distance_km=model.max_distance_km,
                region=model.region, site_block=len(idx), ref=model.ref, memo=_memo(model),
                memo_key=memo_key(computed, s_i), by_region=True, **_region_kwargs(model, idx))
            out[s_i][:, :, missing] = part_columns(by_region, model.parts, (len(model.ims), len(idx),
                                                                            len(model.levels_g)))
        if cache is not None:
            for j in missing:
                cache.put("hazard", keys[j], {"parts": out[:, :, :, j]})
    return SiteBlockResult(block, out, len(keys) - len(missing), len(missing))


def branch_weights(model):
    """Weight of each (source branch, GMM branch) pair, source-major [-].

    The logic-tree weight of a pair is the product of its branch weights.

    Parameters
    ----------
    model : HazardModel
        With ``source_branches`` and ``gmm_branches``.

    Returns
    -------
    ndarray (n_src * n_gmm,)
    """
    ws = np.array([w for _, w, _ in model.source_branches])
    wg = np.array([w for _, w, _ in model.gmm_branches])
    return (ws[:, None] * wg[None, :]).ravel()


def _assemble(parts, n_sites, axis):
    """Concatenate site-block arrays along the site ``axis`` into one array of ``n_sites``."""
    first = parts[0].values
    shape = first.shape[:axis] + (n_sites,) + first.shape[axis + 1:]
    out = np.zeros(shape)
    index = [slice(None)] * len(shape)
    for part in parts:
        index[axis] = slice(*part.block)
        out[tuple(index)] = part.values
    return out


def with_part_curves(model, hazard, parts, fractiles=True):
    """The hazard model and curves once the part curves are known (new objects).

    The end-branch curves (:func:`quakefolio.core.combinations.end_branch_curves`: each
    source branch and active-crustal model with the other regions at their weighted
    mean) give the weighted mean (:func:`quakefolio.core.hazard.weighted_mean`), which
    feeds risk and equals the mean over every combination (linearity of the hazard sum);
    with more than one combination in ``model.combinations`` the fractiles are the
    weighted fractiles over the combinations
    (:func:`quakefolio.core.combinations.combination_fractiles`).

    Parameters
    ----------
    model : HazardModel
    hazard : HazardCurves
        The hazard sites.
    parts : ndarray (n_src, n_columns, n_im, n_sites, n_levels) [1/yr]
        Part curves (:func:`hazard_block`).
    fractiles : bool
        Compute the fractiles (a process that only runs block tasks needs the mean alone).

    Returns
    -------
    (HazardModel, HazardCurves)
        ``branch_curves``, ``part_curves`` and ``statistics`` filled; ``curves[im]`` =
        (levels (n_sites, n_levels) [g], mean rates [1/yr]).
    """
    n_sites = len(hazard.site_id)
    curves = end_branch_curves(parts, model.parts)
    flat = curves.reshape((-1,) + curves.shape[2:])
    statistics = {"mean": weighted_mean(flat, branch_weights(model))}
    combos = model.combinations
    if fractiles and len(combos) > 1:
        for q, arr in zip(model.fractiles, combination_fractiles(parts, combos, model.fractiles)):
            statistics[statistic_name(q)] = arr
    levels = np.broadcast_to(model.levels_g, (n_sites, len(model.levels_g)))
    mean_curves = {im: (np.array(levels), statistics["mean"][i]) for i, im in enumerate(model.ims)}
    return (replace(model, branch_curves=curves, part_curves=parts, statistics=frozen_mapping(statistics)),
            replace(hazard, curves=mean_curves, interpolated=frozenset()))


def combine_hazard(model, hazard, parts):
    """Assemble the site blocks' curves and compute the logic-tree statistics.

    Parameters
    ----------
    model : HazardModel
    hazard : HazardCurves
    parts : list of SiteBlockResult
        From :func:`hazard_block`, any order.

    Returns
    -------
    (HazardModel, HazardCurves)
        As :func:`with_part_curves`.
    """
    return with_part_curves(model, hazard, _assemble(parts, len(hazard.site_id), axis=3))


def disagg_block(model, hazard, return_periods, block, cache=None):
    """Weighted (M, R, epsilon) contributions at the mean curve's return-period levels.

    Cached per site (the key adds the return periods, the bins and the site's mean
    curve); computed with :func:`quakefolio.core.hazard.compute_disaggregation`, with the
    exact rate-weighted moments of magnitude, distance and epsilon (for the means).

    Parameters
    ----------
    model : HazardModel
        With statistics (after :func:`combine_hazard`).
    hazard : HazardCurves
    return_periods : sequence of float [yr]
    block : tuple (lo, hi)
    cache : quakefolio.pipeline.io.cache.StageCache or None

    Returns
    -------
    SiteBlockResult
        ``values`` (n_im, n_block_sites, n_rp, n_mag, n_dist, n_eps) [1/yr] and
        ``moments`` (n_im, n_block_sites, n_rp, 5).
    """
    lo, hi = block
    mean = model.statistics["mean"][:, lo:hi]  # (n_im, n_blk, n_lev)
    with np.errstate(divide="ignore", invalid="ignore"):
        targets = np.log(im_at_rate(1.0 / np.asarray(return_periods), model.levels_g, mean))
    bins = model.bins
    site_keys = _site_keys(model, hazard, lo, hi)
    keys = [digest("disagg-site-moments", k, list(map(float, return_periods)), bins.mag_edges, bins.dist_edges,
                   bins.eps_edges, mean[:, j]) for j, k in enumerate(site_keys)]
    per_site = (len(model.ims), len(return_periods)) + bins.shape
    per_site_moments = (len(model.ims), len(return_periods), len(DISAGG_MOMENTS))
    rows, mom_rows, missing = _cached_rows(cache, "disaggregation", keys, (hi - lo,) + per_site, "contrib",
                                           ("moments", (hi - lo,) + per_site_moments))
    total = np.ascontiguousarray(np.moveaxis(rows, 0, 1))
    moments = np.ascontiguousarray(np.moveaxis(mom_rows, 0, 1))
    if missing:
        idx = lo + np.array(missing)
        computed = [site_keys[j] for j in missing]
        for s_i, (_, ws, src) in enumerate(model.source_branches):
            contrib, mom = compute_disaggregation(
                hazard.lon[idx], hazard.lat[idx], model.site_vs30[idx], src.ruptures,
                [g for _, _, g in model.gmm_branches], [ws * wg for _, wg, _ in model.gmm_branches], model.ims,
                targets[:, missing], bins, truncation_sigma=model.truncation_sigma,
                max_distance_km=model.max_distance_km, region=model.region, site_block=len(idx), ref=model.ref,
                moments=True, memo=_memo(model), memo_key=memo_key(computed, s_i), **_region_kwargs(model, idx))
            total[:, missing] += contrib
            moments[:, missing] += mom
        if cache is not None:
            for j in missing:
                cache.put("disaggregation", keys[j], {"contrib": total[:, j], "moments": moments[:, j]})
    return SiteBlockResult(block, total, len(keys) - len(missing), len(missing), moments=moments)


def combine_disaggregation(model, hazard, parts):
    """The hazard model with the site blocks' disaggregation assembled (a new object).

    Parameters
    ----------
    model : HazardModel
    hazard : HazardCurves
    parts : list of SiteBlockResult
        From :func:`disagg_block`.

    Returns
    -------
    HazardModel
        With ``disagg`` and ``disagg_moments``.
    """
    n_sites = len(hazard.site_id)
    moments = _assemble([replace(p, values=p.moments) for p in parts], n_sites, axis=1)
    return replace(model, disagg=_assemble(parts, n_sites, axis=1), disagg_moments=moments)


# --- tables -----------------------------------------------------------------------------------

def site_hazard_frame(model, hazard):
    """Long-form curves for every statistic (mean and fractiles).

    Parameters
    ----------
    model : HazardModel
        With ``statistics`` (after :func:`combine_hazard`).
    hazard : HazardCurves
        The sites.

    Returns
    -------
    pandas.DataFrame
        ``site_id``, ``im``, ``im_level`` [g], ``annual_rate`` [1/yr], ``statistic``;
        statistic-major, then IM, site and level.
    """
    frames = []
    n_sites, n_lev = len(hazard.site_id), len(model.levels_g)
    for stat, arr in model.statistics.items():
        for i, im in enumerate(model.ims):
            frames.append(pd.DataFrame({"site_id": np.repeat(hazard.site_id, n_lev), "im": im,
                                        "im_level": np.tile(model.levels_g, n_sites), "annual_rate": arr[i].ravel(),
                                        "statistic": stat}))
    return pd.concat(frames, ignore_index=True)


def disaggregation_frames(model, hazard, return_periods, min_share=1e-6):
    r"""``disaggregation`` (non-negligible bin shares) and ``disaggregation_summary`` tables.

    The target level of each return period T is the mean curve's IM at rate 1/T
    (log-log interpolation, :func:`quakefolio.core.curves.im_at_rate`); shares and modal
    magnitude, distance and epsilon come from the bins, the means are exact
    contribution-weighted means over every (site, rupture) pair
    (:func:`quakefolio.core.hazard.disaggregation_summary` with the model's moments).
    Epsilon is the one needed to reach the target level,
    :math:`(\ln x^* - \mu_{\ln Y})/\sigma_{\ln Y}`.

    Parameters
    ----------
    model : HazardModel
        With ``disagg`` and ``statistics`` (after :func:`combine_disaggregation`).
    hazard : HazardCurves
        The sites.
    return_periods : sequence of float [yr]
        The return periods disaggregated.
    min_share : float
        Bins with a share at or below this are left out of the detail table [-].

    Returns
    -------
    detail : pandas.DataFrame
        One row per (site, IM, return period, magnitude, distance, epsilon bin) with its
        ``share`` [-]; bin edges in Mw, km and sigma.
    summary : pandas.DataFrame
        One row per (IM, site, return period): ``im_level`` [g], exact mean and modal
        (bin-centre) magnitude [Mw], distance [km] and epsilon [-].
    """
    rps = np.asarray(return_periods, dtype=float)
    shares, mm, mr, me, om, orr, oe = disaggregation_summary(model.disagg, model.bins, model.disagg_moments)
    n_im, n_sites, n_t = shares.shape[:3]
    targets = im_at_rate(1.0 / rps, model.levels_g, model.statistics["mean"])  # (n_im, n_sites, n_t)
    idx = np.nonzero(shares > min_share)
    b = model.bins
    detail = pd.DataFrame({
        "site_id": hazard.site_id[idx[1]],
        "im": np.array(model.ims, dtype=object)[idx[0]],
        "return_period_yr": rps[idx[2]],
        "im_level": targets[idx[0], idx[1], idx[2]],
        "mag_lo": b.mag_edges[idx[3]], "mag_hi": b.mag_edges[idx[3] + 1],
        "dist_lo_km": b.dist_edges[idx[4]], "dist_hi_km": b.dist_edges[idx[4] + 1],
        "eps_lo": b.eps_edges[idx[5]], "eps_hi": b.eps_edges[idx[5] + 1],
        "share": shares[idx],
    })
    grid = np.meshgrid(np.arange(n_im), np.arange(n_sites), np.arange(n_t), indexing="ij")
    gi, gs, gt = (g.ravel() for g in grid)
    summary = pd.DataFrame({
        "site_id": hazard.site_id[gs], "im": np.array(model.ims, dtype=object)[gi], "return_period_yr": rps[gt],
        "im_level": targets.ravel(), "mean_mag": mm.ravel(), "mean_dist_km": mr.ravel(), "mean_eps": me.ravel(),
        "mode_mag": om.ravel(), "mode_dist_km": orr.ravel(), "mode_eps": oe.ravel(),
    })
    return detail, summary


def site_hazard_table(inputs):
    """Long-form curves (site_id, im, im_level [g], annual_rate [1/yr], statistic).

    Compute mode: every statistic of the hazard model (:func:`site_hazard_frame`); ingest
    mode: the tabulated curves with the configured statistic (period-interpolated IMs are
    not repeated).

    Parameters
    ----------
    inputs : RunInputs
        After the hazard stage.

    Returns
    -------
    pandas.DataFrame
    """
    if inputs.hazard_model is not None:
        return site_hazard_frame(inputs.hazard_model, inputs.hazard)
    frames = []
    hz = inputs.hazard
    stat = inputs.config.hazard.statistic
    for im in sorted(set(hz.curves) - hz.interpolated):
        x, lam = hz.curves[im]
        m, n = x.shape
        frames.append(pd.DataFrame({"site_id": np.repeat(hz.site_id, n), "im": im, "im_level": x.ravel(),
                                    "annual_rate": lam.ravel(), "statistic": stat}))
    return pd.concat(frames, ignore_index=True)


def hazard_at_return_periods_table(inputs):
    """Uniform-hazard values per site, IM, statistic and return period, with a flag column.

    ``flag`` is ``ok``, ``below_rate_floor`` (the rate 1/T is below the configured floor:
    not reported as a design value) or ``outside_range`` (not within the tabulated rates).
    Values are read off each curve by log-log interpolation at rate 1/T
    (:func:`quakefolio.core.curves.im_at_rate`).

    Parameters
    ----------
    inputs : RunInputs
        After the hazard stage.

    Returns
    -------
    pandas.DataFrame
        ``site_id``, ``im``, ``statistic``, ``return_period_yr`` [yr], ``im_level`` [g]
        (NaN unless ``ok``), ``flag``.
    """
    cfg = inputs.config.hazard
    rps = np.asarray(cfg.return_periods_yr)
    target = 1.0 / rps
    frames = []
    for stat, im, x, lam in _curve_sets(inputs):
        vals = im_at_rate(target, x, lam)  # (m, n_rp)
        flag = np.where(np.isnan(vals), "outside_range", "ok")
        floor = np.broadcast_to(target < cfg.rate_floor, vals.shape)
        flag = np.where(floor, "below_rate_floor", flag)
        vals = np.where(floor, np.nan, vals)
        frames.append(pd.DataFrame({"site_id": np.repeat(inputs.hazard.site_id, len(rps)), "im": im,
                                    "statistic": stat, "return_period_yr": np.tile(rps, len(inputs.hazard.site_id)),
                                    "im_level": vals.ravel(), "flag": flag.ravel()}))
    return pd.concat(frames, ignore_index=True)


def _curve_sets(inputs):
    """(statistic, im, levels, rates) for every stored curve set."""
    model = inputs.hazard_model
    if model is None:
        hz = inputs.hazard
        stat = inputs.config.hazard.statistic
        for im in sorted(set(hz.curves) - hz.interpolated):
            yield (stat, im) + tuple(hz.curves[im])
        return
    n_sites = len(inputs.hazard.site_id)
    levels = np.broadcast_to(model.levels_g, (n_sites, len(model.levels_g)))
    for stat, arr in model.statistics.items():
        for i, im in enumerate(model.ims):
            yield stat, im, levels, arr[i]
