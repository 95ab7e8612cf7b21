"""ReFeX feature discovery rounds on pooled reference windows (Henderson et al., KDD 2011).

Round 0 proposes the base features; every later round proposes every aggregate of the
features the previous round kept. Each round bins its candidates on the pooled reference
rows (:mod:`.binning`) and prunes those that agree with an earlier feature or with each
other (:mod:`.pruning`), with a tolerance that grows by a fixed step per round. Discovery
stops when a round keeps nothing new, or after ``max_rounds`` recursive rounds.

Discovery reads each window through :class:`ReferenceColumns`: every feature is computed on
the window's whole graph, and discovery sees it only at the window's sampled rows. A graph
held in this process is :class:`GraphColumns`; one partitioned on a cluster is another
implementation (``rolewatch.scale.training``), so the rounds, bins and pruning are the same
code wherever the features are computed.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from .binning import apply_bins, bin_dtype, bin_edges, max_bins
from .definitions import FeatureDef, base_definitions, children_of, compute_into
from .graph import SnapshotGraph
from .pruning import prune_agreeing

__all__ = ["Discovered", "GraphColumns", "ReferenceColumns", "discover_features", "raw_columns"]

CANDIDATE_CHUNK = 64
"""Candidates computed at once: only this many raw float columns per graph are alive."""


@dataclass
class Discovered:
    """Outcome of discovery: kept features in generation order and their bin edges.

    Attributes
    ----------
    features : list of FeatureDef
    edges : list of numpy.ndarray
        Bin edges of each kept feature on the pooled reference rows.
    binned : numpy.ndarray
        Pooled rows x kept features bin indices (the agreement check of later rounds).
    rounds : int
        Last round run (0 = base features only).
    """

    features: list[FeatureDef] = field(default_factory=list)
    edges: list[np.ndarray] = field(default_factory=list)
    binned: np.ndarray = field(default_factory=lambda: np.zeros((0, 0), dtype=np.uint8))
    rounds: int = 0


class ReferenceColumns(Protocol):
    """One reference window's features, computed on its whole graph and read at its
    sampled rows: what discovery needs of a window, wherever the window's graph lives
    (in this process, :class:`GraphColumns`; on a cluster, partitioned by account).

    Discovery calls :meth:`at_rows` with a round's candidates, then :meth:`keep` with the
    features it kept, whose whole columns are the parents of the next round's candidates.
    """

    @property
    def rows(self) -> int:
        """How many rows :meth:`at_rows` gives per column."""
        ...

    def at_rows(self, defs: Sequence[FeatureDef]) -> list[np.ndarray]:
        """Raw values of ``defs`` (base features, or aggregates of the kept parents) at
        the sampled rows, one float64 column per definition, in the rows' order."""
        ...

    def keep(self, defs: Sequence[FeatureDef]) -> None:
        """Hold the whole columns of ``defs`` as the parents of the next round (the
        previous round's are let go)."""
        ...


class GraphColumns:
    """:class:`ReferenceColumns` of a snapshot graph held in this process.

    Parameters
    ----------
    graph : SnapshotGraph
    rows : numpy.ndarray, optional
        The sampled rows (ascending positions); None: every row.
    """

    def __init__(self, graph: SnapshotGraph, rows: np.ndarray | None = None) -> None:
        self.graph = graph
        self.sample = None if rows is None or rows.size == graph.n else rows
        self.parents: dict[str, np.ndarray] = {}

    @property
    def rows(self) -> int:
        return self.graph.n if self.sample is None else int(self.sample.size)

    def at_rows(self, defs: Sequence[FeatureDef]) -> list[np.ndarray]:
        columns = raw_columns(self.graph, defs, self.parents)
        return columns if self.sample is None else [c[self.sample] for c in columns]

    def keep(self, defs: Sequence[FeatureDef]) -> None:
        columns = raw_columns(self.graph, defs, self.parents)
        self.parents = dict(zip((d.name for d in defs), columns, strict=True))


def discover_features(
    windows: Sequence[ReferenceColumns],
    *,
    max_rounds: int,
    bin_fraction: float,
    tolerance: float,
    tolerance_step: float,
) -> Discovered:
    """Run the ReFeX discovery rounds (Henderson et al., KDD 2011).

    Parameters
    ----------
    windows : sequence of ReferenceColumns
        Reference windows; their sampled rows are pooled for binning and pruning (a sample
        of the accounts, :func:`rolewatch.engine.rowkeys.account_sample`, or all of them),
        while every feature is computed on the whole graph, so a sampled account's
        aggregates see all its neighbours.
    max_rounds : int
        Recursive rounds after the base round, at most.
    bin_fraction : float
        ``p`` of vertical logarithmic binning.
    tolerance, tolerance_step : float
        Round ``r`` prunes with ``tolerance + r * tolerance_step``.

    Returns
    -------
    Discovered
    """
    kept = Discovered(binned=np.zeros((sum(w.rows for w in windows), 0), dtype=np.uint8))
    candidates = base_definitions()
    for rnd in range(max_rounds + 1):
        kept.rounds = rnd
        new = _keep_round(kept, windows, candidates, bin_fraction, tolerance + rnd * tolerance_step)
        if not new or rnd == max_rounds:
            break
        for window in windows:
            window.keep(new)
        candidates = children_of(new, rnd + 1)
    return kept


def _keep_round(
    kept: Discovered,
    windows: Sequence[ReferenceColumns],
    candidates: Sequence[FeatureDef],
    bin_fraction: float,
    tolerance: float,
) -> list[FeatureDef]:
    """Bin and prune one round's candidates; add the survivors to ``kept`` and return them."""
    cand_bin, cand_edges = _bin_candidates(windows, candidates, bin_fraction)
    n_fixed = len(kept.features)
    keep = prune_agreeing(np.hstack([kept.binned, cand_bin]), tolerance, n_fixed=n_fixed)
    new = [int(j) - n_fixed for j in keep if j >= n_fixed]
    if new:
        kept.features.extend(candidates[j] for j in new)
        kept.edges.extend(cand_edges[j] for j in new)
        kept.binned = np.hstack([kept.binned, cand_bin[:, new]])
    return [candidates[j] for j in new]


def _bin_candidates(
    windows: Sequence[ReferenceColumns],
    candidates: Sequence[FeatureDef],
    bin_fraction: float,
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Binned candidate columns pooled over the reference windows' rows, and their edges.

    Candidates are computed :data:`CANDIDATE_CHUNK` at a time so that only a few raw
    float columns are alive at once; bins are kept in the smallest unsigned dtype that
    holds them (:func:`bin_dtype`).
    """
    pooled_rows = sum(w.rows for w in windows)
    dtype = bin_dtype(max_bins(pooled_rows, bin_fraction))
    out = np.zeros((pooled_rows, len(candidates)), dtype=dtype)
    edges: list[np.ndarray] = []
    for lo in range(0, len(candidates), CANDIDATE_CHUNK):
        part = candidates[lo : lo + CANDIDATE_CHUNK]
        per_window = [window.at_rows(part) for window in windows]
        for j in range(len(part)):
            pooled = (
                np.concatenate([cols[j] for cols in per_window])
                if len(windows) > 1
                else per_window[0][j]
            )
            e = bin_edges(pooled, bin_fraction)
            edges.append(e)
            out[:, lo + j] = apply_bins(pooled, e)
    return out, edges


def raw_columns(
    graph: SnapshotGraph, defs: Sequence[FeatureDef], parents: dict[str, np.ndarray]
) -> list[np.ndarray]:
    """Raw columns of ``defs`` on one graph, aggregating already computed ``parents``.

    The columns are views of one Fortran-ordered block, filled by :func:`compute_into`,
    the same evaluation :meth:`FeatureRecipe.transform` uses.

    Parameters
    ----------
    graph : SnapshotGraph
    defs : sequence of FeatureDef
    parents : dict of str to numpy.ndarray
        Raw columns of the parents of the recursive features in ``defs``.

    Returns
    -------
    list of numpy.ndarray
        One length-n float64 column per definition.
    """
    block = np.empty((graph.n, len(defs)), order="F")
    columns = [block[:, j] for j in range(len(defs))]
    compute_into(graph, defs, parents, columns)
    return columns
