"""Vertical logarithmic binning of ReFeX feature columns (Henderson et al., KDD 2011).

With fraction ``p``, the ``p`` fraction of nodes with the lowest values get bin 0, the
lowest ``p`` fraction of the rest bin 1, and so on. :func:`bin_edges` learns the edges of
one column, :func:`apply_bins` bins values on them, and :func:`bin_dtype` /
:func:`max_bins` size the compact unsigned integer tables the bins are kept in.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["RELATIVE_TIE", "apply_bins", "bin_dtype", "bin_edges", "max_bins"]

RELATIVE_TIE = 1e-9
"""Values within this relative distance of each other count as tied when binning, so that
rounding differences (summation order in sums and means) never move a node across a bin
edge (common practice, no source)."""


def _tie_slack(x: np.ndarray | float) -> np.ndarray | float:
    return RELATIVE_TIE * np.maximum(np.abs(x), 1.0)


def bin_edges(values: np.ndarray, fraction: float = 0.5) -> np.ndarray:
    """Vertical logarithmic bin edges of one feature (Henderson et al., KDD 2011).

    The ``ceil(fraction · r)`` lowest of the ``r`` values not yet binned form the next bin,
    extended to every value tied with its largest member (equal within a relative
    ``1e-9``). The returned edges are the largest value of each bin except the last: a
    value ``x`` gets bin ``#{edges < x}``, so values above the reference maximum stay in
    the top bin.

    Parameters
    ----------
    values : numpy.ndarray
        1-D raw feature values (finite).
    fraction : float
        ``p`` in (0, 1).

    Returns
    -------
    numpy.ndarray
        Increasing float64 edges (empty for a constant or empty column).

    Examples
    --------
    Values 1..8 with p = 0.5 (worked by hand): the lowest 4 (1-4) are bin 0, the lowest
    2 of the remaining 4 (5, 6) bin 1, then 7 is bin 2 and 8 is bin 3; edges [4, 6, 7].
    """
    v = np.sort(np.asarray(values, dtype=np.float64).ravel())
    n = v.size
    cuts: list[float] = []
    start = 0
    while start < n:
        take = max(1, math.ceil(fraction * (n - start)))
        top = v[start + take - 1]
        start = int(np.searchsorted(v, top + _tie_slack(top), side="right"))
        cuts.append(float(v[start - 1]))
    return np.asarray(cuts[:-1], dtype=np.float64)


def bin_dtype(n_bins: int) -> np.dtype:
    """Smallest unsigned integer dtype that holds bin indices ``0 .. n_bins - 1``.

    Parameters
    ----------
    n_bins : int

    Returns
    -------
    numpy.dtype
        ``uint8`` up to 256 bins, then ``uint16``, ``uint32``, ``uint64``.
    """
    for dtype in (np.uint8, np.uint16, np.uint32):
        if n_bins - 1 <= np.iinfo(dtype).max:
            return np.dtype(dtype)
    return np.dtype(np.uint64)


def max_bins(n_values: int, fraction: float) -> int:
    """Upper bound on the bins :func:`bin_edges` makes from ``n_values`` values.

    Parameters
    ----------
    n_values : int
        Values binned (rows of the pooled reference snapshots).
    fraction : float
        ``p`` of vertical logarithmic binning (Henderson et al., KDD 2011), in (0, 1).

    Returns
    -------
    int

    Notes
    -----
    Each bin takes at least ``ceil(fraction · r)`` of the ``r`` values left, so after
    ``m`` bins at most ``n (1 - fraction)^m`` values remain: at most one after
    ``ceil(log(n) / -log(1 - fraction))`` bins, which fills one more bin; one further bin
    is allowed for floating-point rounding of the logarithms.
    """
    if n_values <= 1:
        return 1
    shrinking = math.log(n_values) / -math.log1p(-fraction)
    return int(min(n_values, math.ceil(shrinking) + 2))


def apply_bins(values: np.ndarray, edges: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Bin index ``#{edges e : e < x}`` of every value.

    ``x`` within a relative ``1e-9`` of an edge counts as equal to it (stays in that bin).

    Parameters
    ----------
    values : numpy.ndarray
        Raw feature values.
    edges : numpy.ndarray
        Increasing bin edges from :func:`bin_edges`.
    out : numpy.ndarray, optional
        Array shaped like ``values`` (e.g. a column of a feature table) to write the bins
        into; an unsigned integer ``out`` must hold the top index, ``len(edges)``.

    Returns
    -------
    numpy.ndarray
        ``out`` when given, else a new array of :func:`bin_dtype` for ``len(edges) + 1``
        bins.
    """
    edges = np.asarray(edges, dtype=np.float64)
    upper = edges + _tie_slack(edges)
    values = np.asarray(values, dtype=np.float64)
    if out is None:
        out = np.empty(values.shape, dtype=bin_dtype(upper.size + 1))
    elif out.dtype.kind == "u" and upper.size > np.iinfo(out.dtype).max:
        raise ValueError(
            f"{upper.size + 1} bins do not fit in {out.dtype}; use bin_dtype() for out"
        )
    if upper.size > 64:
        out[...] = np.searchsorted(upper, values, side="left")
        return out
    # a few comparisons beat a branchy binary search per value
    counts = (
        out if out.dtype.kind == "u" else np.empty(values.shape, dtype=bin_dtype(upper.size + 1))
    )
    counts[...] = 0
    above = np.empty(values.shape, dtype=bool)
    for edge in upper:
        np.greater(values, edge, out=above)
        counts += above
    if counts is not out:
        out[...] = counts
    return out
