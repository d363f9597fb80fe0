"""Fragility and consequence models: damage-state sets per building class and their library files."""
from quakefolio.fragility.library import load_library, parse_library
from quakefolio.fragility.models import CrossingError, DamageStateSet, FragilityLibrary

__all__ = ["load_library", "parse_library", "DamageStateSet", "FragilityLibrary", "CrossingError"]
