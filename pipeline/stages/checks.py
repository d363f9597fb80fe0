"""Cross-file checks of a fragility class against the hazard, in one place.

Two checks join the fragility library to the hazard: the class's IM is available from the
hazard (tabulated, interpolated across periods, or computed), and the class's damage-state
curves do not cross inside the hazard's IM range.  The read-inputs stage runs them for the
run's classes (:func:`quakefolio.pipeline.stages.inputs.load_inputs`, with
:func:`quakefolio.pipeline.stages.hazard.prepare_compute` in compute mode) and the what-if
stage for the new class of each retrofit alternative
(:func:`quakefolio.pipeline.stages.whatif.validate`); every error names the library file,
its line and key.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, locate_toml_line
from quakefolio.core.ims import im_period
from quakefolio.fragility import CrossingError
from quakefolio.pipeline.io.ingest import UnavailableIM

__all__ = ["LibraryLines", "TabulatedLevels", "computed_levels", "model_periods", "check_class_hazard"]


class LibraryLines:
    """Line numbers in fragility library files; each file's text is read at most once, when a
    line is first asked for (only on an error).
    """

    def __init__(self):
        self._texts = {}

    def row(self, path, table, key=None, occurrence=0):
        """1-based line of ``key`` in ``[table]`` of the library file ``path``, or None.

        Parameters
        ----------
        path : str or Path
            The library file.
        table : tuple of str
            Table path, e.g. ``("classes", "RCF-LO", "states")``.
        key : str or None
            Key inside the table.
        occurrence : int
            Which ``[[array-of-tables]]`` entry (0-based).

        Returns
        -------
        int or None
        """
        name = str(path)
        if name not in self._texts:
            self._texts[name] = Path(path).read_text(encoding="utf-8")
        return locate_toml_line(self._texts[name], table, key, occurrence)


class TabulatedLevels:
    """IM levels from tabulated curves, interpolated across periods where allowed.

    Calling it with an IM keeps the curves made available so far (``self.hazard``, a new
    :class:`~quakefolio.pipeline.io.ingest.HazardCurves` after each interpolation), so a
    later IM is interpolated between the same neighbours as when the curves were filled
    one IM at a time.

    Parameters
    ----------
    hazard : quakefolio.pipeline.io.ingest.HazardCurves
    allow_interpolation : bool
        ``[hazard] period_interpolation``.
    """

    def __init__(self, hazard, allow_interpolation):
        self.hazard = hazard
        self.allow_interpolation = allow_interpolation

    def __call__(self, im):
        """Levels (n_sites, n_levels) [g] of ``im``; raises UnavailableIM."""
        self.hazard = self.hazard.with_im(im, allow_interpolation=self.allow_interpolation)
        return self.hazard.curves[im][0]


def computed_levels(model, config_path):
    """IM levels of computed hazard: the model's level grid for its IMs.

    Parameters
    ----------
    model : quakefolio.pipeline.stages.hazard.HazardModel
    config_path : str or Path
        The run config (named in the message).

    Returns
    -------
    callable
        ``im -> levels (n_levels,) [g]``; raises UnavailableIM for an IM not computed.
    """
    def levels(im):
        if im not in model.ims:
            raise UnavailableIM(f"{im} is not among the computed IMs ({', '.join(model.ims)}); add it to "
                                f"[hazard] ims in {config_path}")
        return model.levels_g

    return levels


def _period_ok(gmm, im):
    if im == "PGA":
        return "PGA" in gmm.supported_ims
    lo, hi = gmm.period_range_s
    return lo <= im_period(im) <= hi


def model_periods(gmms):
    """IM availability before the hazard is computed: every ground-motion model must cover the IM.

    Parameters
    ----------
    gmms : sequence of (id, weight, ground-motion model)

    Returns
    -------
    callable
        ``im -> None`` (the levels are not known yet: no crossing check); raises
        UnavailableIM naming the first model whose periods do not cover the IM.
    """
    def levels(im):
        for gid, _, gmm in gmms:
            if im not in gmm.supported_ims and not _period_ok(gmm, im):
                lo, hi = gmm.period_range_s
                raise UnavailableIM(f"{im} is outside the periods of ground-motion model {gid} ({lo:g}-{hi:g} s)")
        return None

    return levels


def check_class_hazard(dss, levels_of, library_path, lines, *, reject_crossing, alternative=None):
    """The class's IM is available from the hazard, and its curves do not cross in the hazard's range.

    Crossing is tested over ``[min, max]`` of the hazard's IM levels
    (:meth:`quakefolio.fragility.DamageStateSet.check_crossing`).

    Parameters
    ----------
    dss : quakefolio.fragility.DamageStateSet
        The class.
    levels_of : callable
        ``im -> levels [g]`` of the hazard (None: not known yet, no crossing check); raises
        UnavailableIM saying why the hazard cannot provide the IM (:class:`TabulatedLevels`,
        :func:`computed_levels`, :func:`model_periods`).
    library_path : str or Path
        The library file the class comes from.
    lines : LibraryLines
        Line locator of the run's library files.
    reject_crossing : bool
        ``[fragility] crossing = "reject"``.
    alternative : str, optional
        Id of the retrofit alternative whose ``new_class`` this is (named in the message).

    Returns
    -------
    ndarray or None
        The hazard's IM levels for the class [g].

    Raises
    ------
    InputError
        Naming the library file, the class's ``im`` line or the upper crossing state's
        ``beta`` line; or the hazard file where its curves cannot give the class's IM.
    """
    code = dss.class_code
    of_alternative = "" if alternative is None else f" (new_class of alternative {alternative!r})"
    try:
        levels = levels_of(dss.im)
    except UnavailableIM as exc:
        raise InputError(library_path, f"class {code!r}{of_alternative}: {exc}",
                         row=lines.row(library_path, ("classes", code), "im"), column=f"classes.{code}.im") from None
    except InputError as exc:  # located in the hazard file: say which class needed the IM
        raise InputError(exc.path, f"{exc.message} (needed by class {code!r}{of_alternative})", row=exc.row,
                         column=exc.column) from None
    if reject_crossing and levels is not None and dss.has_damage_states:  # a vulnerability table cannot cross
        try:
            dss.check_crossing(float(np.min(levels)), float(np.max(levels)))
        except CrossingError as exc:
            j = dss.names.index(exc.upper)
            raise InputError(library_path, f"{exc}{of_alternative}",
                             row=lines.row(library_path, ("classes", code, "states"), "beta", j),
                             column=f"classes.{code}.states[{j}].beta") from None
    return levels
