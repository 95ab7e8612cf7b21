"""Pure numeric core of rolewatch: arrays in, arrays out (no I/O, clock or database)."""

from .basis import Memberships, RoleBasis
from .errors import EngineInputError, FeatureMismatch, RecipeMismatch, TooManyRoles
from .features import FeatureRecipe, FeatureTable
from .naming import RoleProfile, describe_roles
from .readable import ReadableMeasures, readable_measures
from .scoring import ShiftPolicy, WindowScores, score_window
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
    "RoleProfile",
    "describe_roles",
    "ReadableMeasures",
    "readable_measures",
    "activity_change",
    "baseline_mixture",
    "cosine_distance",
    "feature_moves",
    "hellinger",
    "jensen_shannon",
    "role_aware_distance",
    "total_variation",
]
