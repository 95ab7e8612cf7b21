"""Pure numeric core of rolewatch: arrays in, arrays out (no I/O, clock or database)."""

from .features import FeatureRecipe, FeatureTable
from .snapshot import Snapshot

__all__ = ["FeatureRecipe", "FeatureTable", "Snapshot"]
