"""Errors the role engine raises on input a caller can fix.

Each error subclasses :class:`ValueError` so callers that only know the standard
library still catch it, and each message says what to do about it.
"""

from __future__ import annotations

__all__ = ["EngineInputError", "RecipeMismatch", "TooManyRoles", "FeatureMismatch"]


class EngineInputError(ValueError):
    """Input arrays the engine cannot use (wrong shape, NaN, negative values...)."""


class RecipeMismatch(EngineInputError):
    """A feature table was built by another feature recipe than the role basis expects.

    Role memberships are only meaningful when the table's columns are the very features
    (and bin edges) the basis was fitted on.
    """

    def __init__(self, table_version: str | None, basis_version: str | None):
        self.table_version = table_version
        self.basis_version = basis_version
        super().__init__(
            f"feature table was built with recipe version {table_version!r} but the role "
            f"basis was fitted on recipe version {basis_version!r}; transform the snapshot "
            "with the recipe the basis was fitted on, or fit a new basis on tables of this "
            "recipe"
        )


class FeatureMismatch(EngineInputError):
    """Feature names or feature counts disagree between a table and a basis."""


class TooManyRoles(EngineInputError):
    """More roles were asked for than the feature matrix can support."""
