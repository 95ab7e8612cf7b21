"""Parameters of a feature recipe, each checked under its own name.

ReFeX (Henderson et al., "It's who you know: graph mining using recursive structural
features", KDD 2011) has a binning fraction ``p`` and a pruning tolerance ``s``; a recipe
also has a per-round tolerance step, a round limit and a binning mode for later windows.
A bad value is reported under the parameter's own name with the range it must be in.
"""

from __future__ import annotations

import math

__all__ = ["BINNING_MODES", "check_binning", "check_parameters"]

BINNING_MODES = ("frozen", "relative")


def check_parameters(
    *, bin_fraction: float, tolerance: float, tolerance_step: float, binning: str, max_rounds: int
) -> None:
    """Check every recipe parameter under its own name.

    Parameters
    ----------
    bin_fraction : float
        ``p`` of vertical logarithmic binning, in (0, 1).
    tolerance, tolerance_step : float
        Finite and >= 0.
    binning : str
        One of :data:`BINNING_MODES`.
    max_rounds : int
        An integer >= 0.

    Raises
    ------
    ValueError
        The message names the first parameter out of range and what it must be.
    """
    if not (0.0 < float(bin_fraction) < 1.0):
        raise ValueError(f"bin_fraction must be between 0 and 1 (exclusive), got {bin_fraction!r}")
    _check_non_negative("tolerance", tolerance)
    _check_non_negative("tolerance_step", tolerance_step)
    check_binning(binning)
    if int(max_rounds) != max_rounds or max_rounds < 0:
        raise ValueError(f"max_rounds must be an integer >= 0, got {max_rounds!r}")


def _check_non_negative(name: str, value: float) -> None:
    if not (float(value) >= 0.0) or not math.isfinite(float(value)):
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")


def check_binning(binning: str) -> None:
    """Reject a binning mode other than :data:`BINNING_MODES`."""
    if binning not in BINNING_MODES:
        raise ValueError(f"binning must be one of {BINNING_MODES}, got {binning!r}")
