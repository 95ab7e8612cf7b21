"""What a ReFeX feature name means, and how a list of features is evaluated on a graph.

Recursive features of ReFeX (Henderson et al., "It's who you know: graph mining using
recursive structural features", KDD 2011) are named ``op(parent)`` with ``op`` one of
``sum_in``, ``mean_in`` (over in-neighbours, accounts with an arc into ``v``),
``sum_out``, ``mean_out`` (over out-neighbours) and ``sum_all``, ``mean_all`` (over
``N(v)``); a mean over no neighbour is 0. Example: ``mean_out(sum_in(out_degree))``.

:func:`compute_into` is the evaluation both discovery and transform use: base columns
come from :meth:`SnapshotGraph.base`, recursive ones from :meth:`SnapshotGraph.aggregate`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from .graph import AGGREGATES, BASE_FEATURES, SnapshotGraph

__all__ = [
    "FeatureDef",
    "base_definitions",
    "children_of",
    "compute_features",
    "compute_into",
    "parse_feature",
]


@dataclass(frozen=True)
class FeatureDef:
    """One feature of a recipe.

    Attributes
    ----------
    name : str
        Readable name, e.g. ``mean_out(sum_in(degree))``.
    op : str
        A base feature name (round 0) or one of :data:`AGGREGATES`.
    parent : str or None
        Name of the feature ``op`` aggregates (None for a base feature).
    round : int
        Recursion depth: 0 for base features, parent's round + 1 otherwise.
    """

    name: str
    op: str
    parent: str | None
    round: int


def parse_feature(name: str) -> FeatureDef:
    """Feature definition from its readable name, e.g. ``mean_out(sum_in(degree))``.

    Parameters
    ----------
    name : str

    Returns
    -------
    FeatureDef

    Raises
    ------
    ValueError
        Not a base feature nor ``op(parent)`` with ``op`` in :data:`AGGREGATES`.
    """
    if name in BASE_FEATURES:
        return FeatureDef(name, name, None, 0)
    op, sep, rest = name.partition("(")
    if not sep or not rest.endswith(")") or op not in AGGREGATES:
        raise ValueError(
            f"unknown feature {name!r}; expected a base feature or op(parent) "
            f"with op in {AGGREGATES}"
        )
    parent = parse_feature(rest[:-1])
    return FeatureDef(name, op, parent.name, parent.round + 1)


def base_definitions() -> list[FeatureDef]:
    """The base features, candidates of the first discovery round.

    Returns
    -------
    list of FeatureDef
        One per :data:`BASE_FEATURES` entry, round 0.
    """
    return [FeatureDef(name, name, None, 0) for name in BASE_FEATURES]


def children_of(parents: Sequence[FeatureDef], round_: int) -> list[FeatureDef]:
    """Every aggregate of every parent: the candidates of recursive round ``round_``.

    Parameters
    ----------
    parents : sequence of FeatureDef
        Features kept by the previous round.
    round_ : int
        The round the children belong to.

    Returns
    -------
    list of FeatureDef
        ``op(parent)`` for each parent, then each op of :data:`AGGREGATES`.
    """
    return [FeatureDef(f"{op}({d.name})", op, d.name, round_) for d in parents for op in AGGREGATES]


def compute_into(
    graph: SnapshotGraph,
    defs: Sequence[FeatureDef],
    parents: Mapping[str, np.ndarray],
    columns: Sequence[np.ndarray],
) -> None:
    """Write the raw values of each feature of ``defs`` into its column.

    Parameters
    ----------
    graph : SnapshotGraph
    defs : sequence of FeatureDef
        Base features and/or aggregates of features in ``parents``.
    parents : mapping of str to numpy.ndarray
        Raw columns of the parents the aggregates need, by name.
    columns : sequence of numpy.ndarray
        One length-n float64 output array per definition.

    Notes
    -----
    A sum and a mean over the same neighbours of the same parent share one sparse
    product (:meth:`SnapshotGraph.aggregate`).
    """
    # (direction, parent name) -> {"sum" / "mean": output column}
    targets: dict[tuple[str, str], dict[str, np.ndarray]] = {}
    for d, column in zip(defs, columns, strict=True):
        if d.parent is None:
            column[...] = graph.base(d.op)
            continue
        kind, direction = d.op.split("_")
        targets.setdefault((direction, d.parent), {})[kind] = column
    for (direction, parent), out in targets.items():
        graph.aggregate(
            direction, parents[parent], sum_out=out.get("sum"), mean_out=out.get("mean")
        )


def compute_features(graph: SnapshotGraph, defs: Sequence[FeatureDef]) -> np.ndarray:
    """Raw values of ``defs`` on one graph as an n x f Fortran-ordered matrix.

    ``defs`` must hold every ancestor of its recursive features (a recipe always does).
    Features are evaluated round by round (ReFeX, Henderson et al., KDD 2011), each
    straight into its output column from its parent's column, both contiguous in the
    Fortran-ordered matrix.

    Parameters
    ----------
    graph : SnapshotGraph
    defs : sequence of FeatureDef

    Returns
    -------
    numpy.ndarray
        n x len(defs) float64, Fortran order, column j holding ``defs[j]``.

    Raises
    ------
    ValueError
        A recursive feature's parent is not among ``defs``.
    """
    index = {d.name: j for j, d in enumerate(defs)}
    missing = [d.parent for d in defs if d.parent is not None and d.parent not in index]
    if missing:
        raise ValueError(
            f"feature {missing[0]!r} is needed as a parent but is not defined before its children"
        )
    out = np.zeros((graph.n, len(defs)), order="F")
    columns = {d.name: out[:, j] for j, d in enumerate(defs)}
    for rnd in sorted({d.round for d in defs}):
        layer = [d for d in defs if d.round == rnd]
        compute_into(graph, layer, columns, [columns[d.name] for d in layer])
    return out
