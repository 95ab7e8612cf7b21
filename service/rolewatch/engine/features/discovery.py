"""ReFeX feature discovery rounds on pooled reference snapshots (Henderson et al., KDD 2011).

Round 0 proposes the base features; every later round proposes every aggregate of the
features the previous round kept. Each round bins its candidates on the pooled reference
rows (:mod:`.binning`) and prunes those that agree with an earlier feature or with each
other (:mod:`.pruning`), with a tolerance that grows by a fixed step per round. Discovery
stops when a round keeps nothing new, or after ``max_rounds`` recursive rounds.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .binning import apply_bins, bin_dtype, bin_edges, max_bins
from .definitions import FeatureDef, base_definitions, children_of, compute_into
from .graph import SnapshotGraph
from .pruning import prune_agreeing

__all__ = ["Discovered", "discover_features"]

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


def discover_features(
    graphs: Sequence[SnapshotGraph],
    *,
    max_rounds: int,
    bin_fraction: float,
    tolerance: float,
    tolerance_step: float,
    rows: Sequence[np.ndarray] | None = None,
) -> Discovered:
    """Run the ReFeX discovery rounds (Henderson et al., KDD 2011).

    Parameters
    ----------
    graphs : sequence of SnapshotGraph
        Reference snapshots; their node rows are pooled for binning and pruning.
    max_rounds : int
        Recursive rounds after the base round, at most.
    bin_fraction : float
        ``p`` of vertical logarithmic binning.
    tolerance, tolerance_step : float
        Round ``r`` prunes with ``tolerance + r * tolerance_step``.
    rows : sequence of array of int, optional
        Per graph, the rows binning and pruning look at (a sample of the accounts,
        :func:`rolewatch.engine.rowkeys.account_sample`); every feature is still computed on
        the whole graph, so a sampled account's aggregates see all its neighbours. None:
        all rows.

    Returns
    -------
    Discovered
    """
    picked = [np.arange(g.n) for g in graphs] if rows is None else list(rows)
    if len(picked) != len(graphs):
        raise ValueError(f"{len(graphs)} graphs but row samples for {len(picked)}")
    kept = Discovered(binned=np.zeros((sum(r.size for r in picked), 0), dtype=np.uint8))
    # raw columns of the features kept in the previous round, per snapshot
    frontier: list[dict[str, np.ndarray]] = [{} for _ in graphs]
    candidates = base_definitions()
    for rnd in range(max_rounds + 1):
        kept.rounds = rnd
        new = _keep_round(
            kept,
            graphs,
            picked,
            candidates,
            frontier,
            bin_fraction,
            tolerance + rnd * tolerance_step,
        )
        if not new or rnd == max_rounds:
            break
        frontier = [
            dict(zip((d.name for d in new), raw_columns(g, new, frontier[k]), strict=True))
            for k, g in enumerate(graphs)
        ]
        candidates = children_of(new, rnd + 1)
    return kept


def _keep_round(
    kept: Discovered,
    graphs: Sequence[SnapshotGraph],
    rows: Sequence[np.ndarray],
    candidates: Sequence[FeatureDef],
    frontier: Sequence[dict[str, np.ndarray]],
    bin_fraction: float,
    tolerance: float,
) -> list[FeatureDef]:
    """Bin and prune one round's candidates; add the survivors to ``kept`` and return them."""
    cand_bin, cand_edges = _bin_candidates(graphs, rows, candidates, frontier, bin_fraction)
    n_fixed = len(kept.features)
    keep = prune_agreeing(np.hstack([kept.binned, cand_bin]), tolerance, n_fixed=n_fixed)
    new = [int(j) - n_fixed for j in keep if j >= n_fixed]
    if new:
        kept.features.extend(candidates[j] for j in new)
        kept.edges.extend(cand_edges[j] for j in new)
        kept.binned = np.hstack([kept.binned, cand_bin[:, new]])
    return [candidates[j] for j in new]


def _bin_candidates(
    graphs: Sequence[SnapshotGraph],
    rows: Sequence[np.ndarray],
    candidates: Sequence[FeatureDef],
    frontier: Sequence[dict[str, np.ndarray]],
    bin_fraction: float,
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Binned candidate columns pooled over the reference graphs' ``rows``, and their edges.

    Candidates are computed :data:`CANDIDATE_CHUNK` at a time so that only a few raw
    float columns are alive at once; bins are kept in the smallest unsigned dtype that
    holds them (:func:`bin_dtype`).
    """
    pooled_rows = sum(r.size for r in rows)
    dtype = bin_dtype(max_bins(pooled_rows, bin_fraction))
    out = np.zeros((pooled_rows, len(candidates)), dtype=dtype)
    whole = [r.size == g.n for r, g in zip(rows, graphs, strict=True)]
    edges: list[np.ndarray] = []
    for lo in range(0, len(candidates), CANDIDATE_CHUNK):
        part = candidates[lo : lo + CANDIDATE_CHUNK]
        per_graph = [
            [c if whole[k] else c[rows[k]] for c in raw_columns(g, part, frontier[k])]
            for k, g in enumerate(graphs)
        ]
        for j in range(len(part)):
            pooled = (
                np.concatenate([cols[j] for cols in per_graph])
                if len(graphs) > 1
                else per_graph[0][j]
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
