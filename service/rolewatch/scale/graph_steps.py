"""The per-partition steps of a window's graph on Dask, as plain numpy / scipy.sparse
functions of one partition's block of rows: routing events to the partitions of their two
accounts, the block's adjacency rows and local counts, the values its neighbours' owners
send back, and the degree-ordered triangle listing.

They compute the quantities of :class:`rolewatch.engine.features.graph.SnapshotGraph` (ReFeX
base features, Henderson et al., KDD 2011) on the rows one partition owns:
:mod:`rolewatch.scale.graph` chains them with the row exchange of
:mod:`rolewatch.scale.partitions`. A block's adjacency rows keep only the columns its rows
touch (``need``, sorted codes), so a neighbour sum is one sparse product with the
neighbours' values in that order, as the engine's ``M @ column``. Triangles are listed once
each in the degree-ordered ("forward") orientation of Schank & Wagner ("Finding, counting
and listing all triangles in large graphs", 2005), as in
:mod:`rolewatch.engine.features.triangles`: the lowest-ranked corner ``lo`` owns the
triangle, its wedges ``lo -> b``, ``lo -> c`` are closed by the arc between ``b`` and ``c``
read from the rows ``b``'s and ``c``'s owners send.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp

from rolewatch.engine.sorting import unique_sorted

__all__ = [
    "EVENT_DTYPE",
    "BLOCK_COLUMNS",
    "Block",
    "Oriented",
    "build_block",
    "count_triangles",
    "egonet_columns",
    "need_parts",
    "orient",
    "out_arcs",
    "route_events",
    "take_columns",
    "take_upper",
    "triangle_sums",
]

EVENT_DTYPE = np.int32  # account codes on the workers (fewer than 2**31 accounts a window)
MAX_WEDGES = 4_000_000  # wedges generated at once, as in the engine's kernel
BLOCK_COLUMNS = ("degree", "out_degree", "in_degree")  # kept with the adjacency (means, ranks)


def _nbytes(*parts: np.ndarray | sp.csr_matrix) -> int:
    """Bytes held by arrays and CSR matrices, plus a little for the object itself.

    Blocks are Dask results: Dask measures a result with ``sys.getsizeof`` unless told
    otherwise, which would count a block's matrices as nothing, so the workers would neither
    see them in their managed memory nor spill them to disk under pressure.
    """
    total = 256
    for part in parts:
        if isinstance(part, sp.csr_matrix):
            total += part.data.nbytes + part.indices.nbytes + part.indptr.nbytes
        else:
            total += np.asarray(part).nbytes
    return total


@dataclass(frozen=True, eq=False)
class Block:
    """The accounts ``lo <= code < lo + rows`` of one partition.

    ``need`` are the sorted codes of their neighbours; ``out``, ``inn`` and ``all`` are
    boolean CSR patterns (``rows x len(need)``) listing out-, in- and all neighbours by
    position in ``need`` (:meth:`adjacency_of` gives them as 0/1 float64 for products);
    ``mutual`` marks the entries of ``all`` that run both ways; ``columns`` the rows'
    degrees (:data:`BLOCK_COLUMNS`, float64), which the means and the triangle ranks read.

    A block never changes once built: the feature columns of its rows are separate Dask
    results (plain dicts of arrays), so each round makes new small results instead of new
    blocks that would share, and be counted and spilled with, the same matrices.
    """

    lo: int
    rows: int
    need: np.ndarray
    out: sp.csr_matrix
    inn: sp.csr_matrix
    all: sp.csr_matrix
    mutual: np.ndarray
    columns: dict[str, np.ndarray]

    def adjacency_of(self, direction: str) -> sp.csr_matrix:
        """The 0/1 float64 rows of one direction, for products (built on the fly: the block
        keeps its patterns one byte an entry)."""
        pattern = {"in": self.inn, "out": self.out, "all": self.all}[direction]
        return sp.csr_matrix(
            (np.ones(pattern.nnz), pattern.indices, pattern.indptr), shape=pattern.shape
        )

    def __sizeof__(self) -> int:
        return _nbytes(
            self.need,
            self.out,
            self.inn,
            self.all,
            self.mutual,
            *self.columns.values(),
        )


def route_events(chunk: tuple[np.ndarray, ...], bounds: np.ndarray) -> tuple:
    """A chunk of events (``actor, target, weight``; codes) split for every partition into
    the events it sent and the events it received: item ``j`` is ``(rows, other, weight)``
    twice, rows relative to partition ``j``'s first code."""
    from rolewatch.scale.partitions import split_by_range

    actor, target, weight = chunk
    sent, received = split_by_range(actor, bounds), split_by_range(target, bounds)
    pieces = []
    for j in range(len(bounds) - 1):
        s, r = sent[j], received[j]
        pieces.append(
            (
                (actor[s] - bounds[j], target[s], weight[s]),
                (target[r] - bounds[j], actor[r], weight[r]),
            )
        )
    return tuple(pieces)


def _summed(rows: int, n: int, pieces: Sequence[tuple[np.ndarray, ...]]) -> tuple:
    """Events (``row, other, weight``) summed per pair: event counts and weights as CSR
    rows with sorted columns."""
    row = np.concatenate([p[0] for p in pieces]).astype(np.int64)
    other = np.concatenate([p[1] for p in pieces]).astype(np.int64)
    weight = np.concatenate([p[2] for p in pieces])
    counts = sp.csr_matrix((np.ones(row.size), (row, other)), shape=(rows, n))
    weights = sp.csr_matrix((weight, (row, other)), shape=(rows, n))
    counts.sum_duplicates()
    weights.sum_duplicates()
    return counts, weights


def _ones(m: sp.csr_matrix) -> sp.csr_matrix:
    """``m``'s pattern as 0/1 float64 (same shape and columns)."""
    return sp.csr_matrix((np.ones(m.nnz), m.indices, m.indptr), shape=m.shape)


def _compact(m: sp.csr_matrix, need: np.ndarray) -> sp.csr_matrix:
    """``m``'s pattern (boolean: a block holds many, and products need no stored ones)
    with columns renumbered to positions in ``need``."""
    columns = np.searchsorted(need, m.indices).astype(np.int32)
    return sp.csr_matrix(
        (np.ones(m.nnz, dtype=bool), columns, m.indptr.astype(np.int64)),
        shape=(m.shape[0], need.size),
    )


def build_block(lo: int, hi: int, n: int, *pieces: tuple) -> tuple[Block, dict[str, np.ndarray]]:
    """Partition ``[lo, hi)``'s adjacency rows and its local ReFeX counts (by name, float64)
    from the routed events (``(sent, received)`` pieces, one per chunk)."""
    rows = hi - lo
    out_counts, out_weights = _summed(rows, n, [p[0] for p in pieces])
    in_counts, in_weights = _summed(rows, n, [p[1] for p in pieces])
    both = (_ones(out_counts) + _ones(in_counts)).tocsr()
    both.sort_indices()
    need = unique_sorted(both.indices.astype(np.int64))
    mutual = both.data == 2.0
    degree = np.diff(both.indptr).astype(np.float64)
    entry_row = np.repeat(np.arange(rows), np.diff(both.indptr))
    reciprocal = np.bincount(entry_row[mutual], minlength=rows).astype(np.float64)
    columns = {
        "in_degree": np.diff(in_counts.indptr).astype(np.float64),
        "out_degree": np.diff(out_counts.indptr).astype(np.float64),
        "degree": degree,
        "in_strength": np.asarray(in_weights.sum(axis=1), dtype=np.float64).ravel(),
        "out_strength": np.asarray(out_weights.sum(axis=1), dtype=np.float64).ravel(),
        "in_events": np.asarray(in_counts.sum(axis=1), dtype=np.float64).ravel(),
        "out_events": np.asarray(out_counts.sum(axis=1), dtype=np.float64).ravel(),
        "reciprocity": np.divide(reciprocal, degree, out=np.zeros(rows), where=degree > 0),
    }
    block = Block(
        lo=lo,
        rows=rows,
        need=need,
        out=_compact(out_counts, need),
        inn=_compact(in_counts, need),
        all=_compact(both, need),
        mutual=mutual,
        columns={name: columns[name].copy() for name in BLOCK_COLUMNS},
    )
    return block, columns


def out_arcs(lo: int, hi: int, n: int, *pieces: tuple) -> tuple[sp.csr_matrix, sp.csr_matrix]:
    """Partition ``[lo, hi)``'s rows of the window's snapshot: each account's events to each
    counterpart, counted and their weights summed (CSR, ``rows x n``, sorted columns, one
    pattern for both), from the routed events as :func:`build_block` takes them."""
    return _summed(hi - lo, n, [p[0] for p in pieces])


def need_parts(block: Block, bounds: np.ndarray) -> tuple[np.ndarray, ...]:
    """The rows ``block`` needs from each partition, relative to its first code."""
    cuts = np.searchsorted(block.need, bounds)
    return tuple(block.need[cuts[j] : cuts[j + 1]] - bounds[j] for j in range(len(bounds) - 1))


def take_columns(
    values: Block | dict[str, np.ndarray], rows: np.ndarray, names: Sequence[str]
) -> np.ndarray:
    """The values of ``names`` at ``rows`` of a block or of a partition's feature columns
    (rows x names, float64)."""
    columns = values.columns if isinstance(values, Block) else values
    return np.column_stack([columns[name][rows] for name in names]).reshape(rows.size, len(names))


def _stacked(pieces: Sequence[np.ndarray]) -> np.ndarray:
    """Fetched rows from every owner, in ``need`` order, one contiguous array per column."""
    return np.asfortranarray(np.concatenate(pieces, axis=0))


@dataclass(frozen=True, eq=False)
class Oriented:
    """A block's arcs to higher-ranked neighbours (rank: ``(degree, code)``) as CSR rows
    over ``need`` (data 2.0 where the pair runs both ways, else 1.0), the neighbours'
    degrees, and the block's neighbour sums of degree, out- and in-degree."""

    lo: int
    need: np.ndarray
    need_degree: np.ndarray
    upper: sp.csr_matrix
    sums: tuple[np.ndarray, np.ndarray, np.ndarray]

    def __sizeof__(self) -> int:
        return _nbytes(self.need, self.need_degree, self.upper, *self.sums)


def orient(block: Block, *pieces: np.ndarray) -> Oriented:
    """:class:`Oriented` from the neighbours' ``degree, out_degree, in_degree`` (fetched)."""
    fetched = _stacked(pieces)
    need_degree = fetched[:, 0]
    rows = np.repeat(np.arange(block.rows), np.diff(block.all.indptr))
    own = block.columns["degree"][rows]
    theirs = need_degree[block.all.indices]
    codes = block.need[block.all.indices]
    higher = (theirs > own) | ((theirs == own) & (codes > rows + block.lo))
    data = np.where(block.mutual, 2.0, 1.0)[higher]
    upper = sp.csr_matrix(
        (
            data,
            block.all.indices[higher],
            np.concatenate([[0], np.cumsum(np.bincount(rows[higher], minlength=block.rows))]),
        ),
        shape=block.all.shape,
    )
    adjacency = block.adjacency_of("all")
    sums = (adjacency @ fetched[:, 0], adjacency @ fetched[:, 1], adjacency @ fetched[:, 2])
    return Oriented(block.lo, block.need, need_degree, upper, sums)


def take_upper(oriented: Oriented, rows: np.ndarray) -> tuple[np.ndarray, ...]:
    """The higher-ranked arcs of ``rows``: per row its arc count, then every arc's head
    code and whether it runs both ways."""
    part = oriented.upper[rows]
    return np.diff(part.indptr), oriented.need[part.indices], part.data == 2.0


def _arc_keys(oriented: Oriented, n: int, pieces: Sequence[tuple]) -> tuple:
    """Sorted keys ``tail * n + head`` of the arcs of every neighbour, with mutual flags."""
    lengths = np.concatenate([p[0] for p in pieces])
    heads = np.concatenate([p[1] for p in pieces]).astype(np.int64)
    flags = np.concatenate([p[2] for p in pieces])
    keys = np.repeat(oriented.need, lengths) * n + heads  # need and heads sorted: keys too
    return keys, flags


def _contains(sorted_keys: np.ndarray, query: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Membership of ``query`` in ``sorted_keys``: (hit mask, position where hit)."""
    if sorted_keys.size == 0:
        return np.zeros(query.shape, dtype=bool), np.zeros(query.shape, dtype=np.int64)
    pos = np.searchsorted(sorted_keys, query)
    np.minimum(pos, sorted_keys.size - 1, out=pos)
    return sorted_keys[pos] == query, pos


def _wedges(upper: sp.csr_matrix) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """Per chunk of at most :data:`MAX_WEDGES` wedges: the row, and each pair of
    positions ``first < second`` in that row of ``upper``."""
    positions = np.arange(upper.nnz, dtype=np.int64)
    row = np.repeat(np.arange(upper.shape[0], dtype=np.int64), np.diff(upper.indptr))
    later = upper.indptr[row + 1] - positions - 1
    cum = np.concatenate([[0], np.cumsum(later)])
    lo = 0
    while lo < upper.nnz:
        hi = int(np.searchsorted(cum, cum[lo] + MAX_WEDGES, side="right")) - 1
        hi = min(max(hi, lo + 1), upper.nnz)
        counts = later[lo:hi]
        total = int(cum[hi] - cum[lo])
        if total:
            first = np.repeat(positions[lo:hi], counts)
            second = np.arange(total, dtype=np.int64)
            second += np.repeat(positions[lo:hi] + 1 - (cum[lo:hi] - cum[lo]), counts)
            yield row[first], first, second
        lo = hi


def count_triangles(oriented: Oriented, n: int, bounds: np.ndarray, *pieces: tuple) -> tuple:
    """Triangles owned by the block's accounts (their lowest-ranked corner), counted at
    all three corners: item ``j`` is ``(rows of partition j, triangles, opposite arc
    mutual)``; item ``P`` the block's neighbour sums (passed through for the egonet)."""
    keys, flags = _arc_keys(oriented, n, pieces)
    upper, need, degree = oriented.upper, oriented.need, oriented.need_degree
    rows = upper.shape[0]
    own_tri, own_opposite = np.zeros(rows), np.zeros(rows)
    tri, opposite = np.zeros(need.size), np.zeros(need.size)
    mutual = upper.data == 2.0
    for lo, first, second in _wedges(upper):
        b, c = upper.indices[first], upper.indices[second]
        b_low = (degree[b] < degree[c]) | ((degree[b] == degree[c]) & (need[b] < need[c]))
        tail, head = np.where(b_low, need[b], need[c]), np.where(b_low, need[c], need[b])
        hit, pos = _contains(keys, tail * n + head)
        lo, b, c, first, second, pos = lo[hit], b[hit], c[hit], first[hit], second[hit], pos[hit]
        own_tri += np.bincount(lo, minlength=rows)
        own_opposite += np.bincount(lo, weights=flags[pos], minlength=rows)
        tri += np.bincount(b, minlength=need.size) + np.bincount(c, minlength=need.size)
        opposite += np.bincount(b, weights=mutual[second], minlength=need.size)
        opposite += np.bincount(c, weights=mutual[first], minlength=need.size)
    cuts = np.searchsorted(need, bounds)
    items: list[tuple] = []
    for j in range(len(bounds) - 1):
        span = slice(cuts[j], cuts[j + 1])
        touched = tri[span] > 0
        items.append((need[span][touched] - bounds[j], tri[span][touched], opposite[span][touched]))
    home = int(np.searchsorted(bounds, oriented.lo, side="right")) - 1
    mine = np.flatnonzero(own_tri > 0)
    rows_home, tri_home, opposite_home = items[home]
    items[home] = (
        np.concatenate([rows_home, mine]),
        np.concatenate([tri_home, own_tri[mine]]),
        np.concatenate([opposite_home, own_opposite[mine]]),
    )
    return (*items, oriented.sums)


def triangle_sums(rows: int, pieces: Sequence[tuple]) -> tuple[np.ndarray, np.ndarray]:
    """Triangles and triangles with a mutual opposite arc per row of a block, summed from
    the counts every partition sent it."""
    index = np.concatenate([p[0] for p in pieces]).astype(np.int64)
    tri = np.bincount(index, weights=np.concatenate([p[1] for p in pieces]), minlength=rows)
    opposite = np.bincount(index, weights=np.concatenate([p[2] for p in pieces]), minlength=rows)
    return tri.astype(np.float64), opposite.astype(np.float64)


def egonet_columns(
    columns: dict[str, np.ndarray],
    sums: tuple[np.ndarray, np.ndarray, np.ndarray],
    tri: np.ndarray,
    opposite_mutual: np.ndarray,
) -> dict[str, np.ndarray]:
    """The ReFeX egonet features of a block (the formulas of
    :mod:`rolewatch.engine.features.graph`), from its degrees, its neighbour sums of
    degree, out- and in-degree, and its triangle counts."""
    deg, din, dout = columns["degree"], columns["in_degree"], columns["out_degree"]
    sum_degree, sum_out, sum_in = sums
    arcs_among = tri + opposite_mutual
    return {
        "ego_edges": deg + tri,
        "ego_boundary_edges": sum_degree - deg - 2.0 * tri,
        "ego_arcs_within": din + dout + arcs_among,
        "ego_arcs_out": sum_out - din - arcs_among,
        "ego_arcs_in": sum_in - dout - arcs_among,
    }
