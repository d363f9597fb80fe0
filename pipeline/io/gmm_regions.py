"""Ground-motion branches of the tectonic regions other than active crustal (``[hazard] region_gmm_branches``).

``[hazard] gmm_branches`` stays the list of the active-crustal models; the optional table
``region_gmm_branches`` gives one list per other region present in the source models::

    [hazard]
    gmm_branches = [{ model = "BSSA14", weight = 0.5 }, { model = "CB14", weight = 0.5 }]
    region_gmm_branches = { subduction_interface = [{ model = "AG16", weight = 1.0 }],
                            subduction_intraslab = [{ model = "AG16", weight = 1.0 }] }

Region names are those of :data:`quakefolio.core.gmm.TECTONIC_REGIONS` (a source's
``region`` in its source-model file); each model must be one made for the region and the
weights of a region sum to 1.  How the regions combine in the logic tree:
:func:`quakefolio.core.hazard.compute_site_hazard`.
"""
from __future__ import annotations

from quakefolio.core.errors import did_you_mean
from quakefolio.core.validation import Constraint, Invalid

__all__ = ["RegionBranches", "parse_region_branches", "missing_regions"]

_KEYS = ("model", "weight")


def parse_region_branches(value):
    """The ``region_gmm_branches`` table, checked.

    Parameters
    ----------
    value : object
        The parsed TOML value: a table of region name -> list of ``{model, weight}``.

    Returns
    -------
    dict of str to list of dict
        ``{"model", "weight", "id"}`` per branch, regions in file order.

    Raises
    ------
    quakefolio.core.validation.Invalid
        With the message; the caller adds file, line and key.
    """
    from quakefolio.core.gmm import GMM_REGISTRY, TECTONIC_REGIONS, models_for_region

    if not isinstance(value, dict):
        raise Invalid("expected a table of region = [{ model = ..., weight = ... }]")
    others = TECTONIC_REGIONS[1:]
    out = {}
    for region, branches in value.items():
        if region == TECTONIC_REGIONS[0]:
            raise Invalid("the active_crustal branches are [hazard] gmm_branches")
        if region not in others:
            raise Invalid(f"unknown tectonic region '{region}'"
                          + did_you_mean(region, others, cutoff=0.6, otherwise=f"; valid: {', '.join(others)}"))
        if not isinstance(branches, list) or not branches or not all(isinstance(b, dict) for b in branches):
            raise Invalid(f"{region}: expected a list of tables like {{ model = ..., weight = ... }}")
        rows = [_branch(region, i, entry, models_for_region(region), GMM_REGISTRY) for i, entry in enumerate(branches)]
        total = sum(b["weight"] for b in rows)
        if abs(total - 1.0) > 1e-6:
            raise Invalid(f"{region}: branch weights must sum to 1, got {total:.6g}")
        if len({b["id"] for b in rows}) != len(rows):
            raise Invalid(f"{region}: each model may appear once")
        out[region] = rows
    return out


def _branch(region, i, entry, valid, registry):
    """One ``{model, weight}`` table of a region, checked."""
    for key in entry:
        if key not in _KEYS:
            raise Invalid(f"{region} branch {i + 1}: unknown key '{key}'; valid: model, weight")
    model, weight = entry.get("model"), entry.get("weight")
    if model not in valid:
        what = "unknown" if model not in registry else f"not a {region}"
        raise Invalid(f"{region} branch {i + 1}: {what} ground-motion model {model!r}; valid: {', '.join(valid)}")
    if isinstance(weight, bool) or not isinstance(weight, (int, float)) or not 0 < weight <= 1:
        raise Invalid(f"{region} branch {i + 1}: weight must be a number in (0, 1], got {weight!r}")
    return {"model": model, "weight": float(weight), "id": model}


class RegionBranches(Constraint):
    """``[hazard] region_gmm_branches``, checked and converted by :func:`parse_region_branches`."""

    def holds(self, value):
        """Always true: :meth:`convert` checks and raises with the message.

        Parameters
        ----------
        value : object

        Returns
        -------
        bool
        """
        return True

    def convert(self, value, context):
        """The checked branches (:func:`parse_region_branches`).

        Parameters
        ----------
        value : object
        context : dict

        Returns
        -------
        dict
        """
        return parse_region_branches(value)


def missing_regions(regions, region_branches):
    """Tectonic regions of the sources that have no ground-motion branches.

    Parameters
    ----------
    regions : iterable of str
        Regions of the source models' ruptures.
    region_branches : dict or None
        ``[hazard] region_gmm_branches``.

    Returns
    -------
    list of str
        Sorted; ``active_crustal`` never (its branches are ``gmm_branches``).
    """
    return sorted(set(regions) - {"active_crustal"} - set(region_branches or {}))
