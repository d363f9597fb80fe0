"""Fragility and consequence models: damage-state sets per building class and their library files."""
from quakefolio.fragility.fitting import (
    FragilityFit,
    GoodnessOfFit,
    combine_dispersion,
    fit_ida,
    fit_ida_truncated,
    fit_msa,
)
from quakefolio.fragility.library import load_library, parse_library
from quakefolio.fragility.models import CrossingError, DamageStateSet, FragilityLibrary

__all__ = ["load_library", "parse_library", "DamageStateSet", "FragilityLibrary", "CrossingError",
           "fit_msa", "fit_ida", "fit_ida_truncated", "combine_dispersion", "FragilityFit", "GoodnessOfFit"]
