"""Pure numeric core of rolewatch: arrays in, arrays out (no I/O, clock or database)."""

from .basis import Memberships, RoleBasis
from .errors import EngineInputError, FeatureMismatch, RecipeMismatch, TooManyRoles
from .features import FeatureRecipe, FeatureTable
from .scoring import ShiftPolicy, WindowScores, score_window
from .sensemaking import RoleDescription, describe_roles, node_measures
from .shift import (
    activity_change,
    baseline_mixture,
    cosine_distance,
    feature_moves,
    hellinger,
    jensen_shannon,
    role_aware_distance,
    total_variation,
)
from .snapshot import Snapshot

__all__ = ["FeatureRecipe", "FeatureTable", "Snapshot"]
__all__ += [
    "Memberships",
    "RoleBasis",
    "EngineInputError",
    "FeatureMismatch",
    "RecipeMismatch",
    "TooManyRoles",
    "ShiftPolicy",
    "WindowScores",
    "score_window",
    "RoleDescription",
    "describe_roles",
    "node_measures",
    "activity_change",
    "baseline_mixture",
    "cosine_distance",
    "feature_moves",
    "hellinger",
    "jensen_shannon",
    "role_aware_distance",
    "total_variation",
]
