"""A window's events read from the Parquet event archive by the Dask workers, so the
closing process never holds them (``event_source = "archive"`` with ``compute = "dask"``).

Each archive file of the window's slots is read by tasks on the workers, one per run of
whole row groups of at most about :data:`READ_ROWS` rows, their rows split into buckets by a
hash of the event id (:mod:`rolewatch.scale.id_hash`; about :data:`BUCKET_EVENTS` events a
bucket, :func:`bucket_count`); the events the
store holds (the REST ingest beside the archive) join as one more source. Each bucket then
keeps every id once, by the archive's and the store's rule (an id's earliest row; at equal
times the archive's before the store's, of two files the one whose path sorts first: what
:func:`rolewatch.scale.source.window_events` keeps), and lists its accounts. One task joins
the lists into the window's distinct accounts, sorted (the snapshot's nodes, their
positions the account codes); the closing process gathers that list, and each bucket
codes its events against it: the chunks the graph is built from
(:func:`rolewatch.scale.graph.build_graph`, as from events this process would scatter).
The snapshot this process keeps for the communities, the baselines and the evidence is
assembled from each partition's out-arcs (one row of summed counts and weights per account
and counterpart: the window's distinct pairs, not its events); the evidence's sample
event ids are looked up in the buckets, which stay on the workers until the close ends.
An earlier window read again for the evidence's "before" (an alerted account's baseline)
leaves its out-arcs on the workers, and this process gathers only the alerted accounts'
arcs (:meth:`WorkerEvents.snapshot_around`).

A worker lost mid-close loses nothing that cannot be computed again: every chunk and the
account list are tasks reading the archive (the store's events travel in the tasks). No
value is scattered: a broadcast racing a worker's death failed inside Dask's scheduler.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import scipy.sparse as sp

from rolewatch.engine.snapshot import Snapshot
from rolewatch.scale.graph import WindowGraph, build_graph
from rolewatch.scale.graph_steps import EVENT_DTYPE
from rolewatch.scale.id_hash import hash_buckets
from rolewatch.scale.partitions import Partitioned, balanced_bounds
from rolewatch.scale.workers import live_workers

__all__ = [
    "FilePart",
    "WorkerEvents",
    "bucket_count",
    "file_parts",
    "read_on_workers",
    "stored_batches_table",
    "stored_table",
]

_READ = ["id", "time", "actor", "target", "weight"]
# Rows one read task takes at most (whole row groups), and the events a bucket holds about:
# a 30,000,000-event window read in files of 2,000,000 rows into 4 buckets had its workers
# restarted over their 3 GB limit, into 32 buckets it read at 2.2-2.5 GB (measured here).
READ_ROWS = 1_000_000
BUCKET_EVENTS = 1_000_000
MAX_BUCKETS = 1024  # files' parts times buckets is the number of tasks that split the reads


@dataclass(eq=False)
class WorkerEvents:
    """A window's events held by the Dask workers: what a close reads of them.

    ``chunks`` are the coded events (one future per bucket) and ``graph`` the blocks built
    from them for the snapshot, handed once to the features (:meth:`take_graph`; a retried
    measure builds them again from ``chunks``); ``samples`` one future per bucket of its
    events' times and ids (in the chunk's order), for the evidence; ``account_list`` the
    future of the sorted accounts the buckets were coded against, held so Dask can code a
    lost bucket again; ``arcs`` each partition's out-arcs when the read left them on the
    workers (``window`` is then None until :meth:`snapshot` gathers it).
    """

    accounts: np.ndarray  # sorted distinct ids, object array: the snapshot's nodes
    window: Snapshot | None  # None: gathered from ``arcs`` when first asked for
    chunks: Partitioned
    samples: tuple[Any, ...]
    count: int
    from_store: int
    graph: WindowGraph | None = field(default=None, repr=False)
    account_list: Any = field(default=None, repr=False)
    arcs: Partitioned | None = field(default=None, repr=False)  # each partition's out-arcs

    def __len__(self) -> int:
        return self.count

    def snapshot(self) -> Snapshot:
        """The window's snapshot (gathered from the partitions' out-arcs the first time
        when the read left them on the workers)."""
        if self.window is None:
            assert self.arcs is not None
            self.window = _snapshot(self.accounts, self.arcs.gather())
        return self.window

    def snapshot_around(self, accounts: np.ndarray) -> Snapshot:
        """The window's snapshot (every account a node) holding only the arcs into and out
        of ``accounts`` (ids; those not in the window are left out): all that the evidence
        reads of a window for some accounts (their own ties, both ways: the readable
        measures and counterparts) without the whole graph in this process. The whole
        snapshot when it is here already."""
        if self.window is not None:
            return self.window
        assert self.arcs is not None
        ids = np.asarray(accounts, dtype=object)
        at = np.searchsorted(self.accounts, ids)
        inside = at < len(self.accounts)
        at, ids = at[inside], ids[inside]
        codes = np.unique(at[self.accounts[at] == ids]).astype(np.int64)
        client = self.arcs.client
        touching = client.gather(
            [
                client.submit(_arcs_touching, arcs, int(lo), codes, pure=False)
                for arcs, lo in zip(self.arcs.futures, self.arcs.bounds[:-1], strict=True)
            ]
        )
        return _snapshot_of_arcs(self.accounts, touching)

    def account_count(self) -> int:
        return len(self.accounts)

    def take_graph(self) -> WindowGraph | None:
        """The graph built while reading (once; None after)."""
        graph, self.graph = self.graph, None
        return graph

    def sample_event_ids(self, rows: np.ndarray, per_account: int = 5) -> dict[int, list[str]]:
        """The first ``per_account`` event ids (in (time, id) order) that involve each of
        ``rows`` (positions among :attr:`accounts`): each bucket sends its first few for
        those accounts, and the first few of all of them are kept."""
        rows = np.unique(np.asarray(rows, dtype=np.int64))
        if not rows.size or not self.samples:
            return {}
        client = self.chunks.client
        found = client.gather(
            [
                client.submit(_first_events, c, s, rows, per_account, pure=False)
                for c, s in zip(self.chunks.futures, self.samples, strict=True)
            ]
        )
        node = np.concatenate([f[0] for f in found])
        time = np.concatenate([f[1] for f in found])
        ids = pa.concat_arrays([f[2] for f in found])
        table = pa.table({"node": node, "time": time, "id": ids})
        table = table.sort_by([("node", "ascending"), ("time", "ascending"), ("id", "ascending")])
        samples: dict[int, list[str]] = {}
        for one, event_id in zip(
            table.column("node").to_pylist(), table.column("id").to_pylist(), strict=True
        ):
            taken = samples.setdefault(int(one), [])
            if len(taken) < per_account:
                taken.append(str(event_id))
        return samples


def read_on_workers(
    client: Any,
    archive: str,
    paths: Sequence[str],
    stored: pa.Table,
    start_us: int,
    end_us: int,
    partitions_for: Callable[[int], int],
    buckets: int | None = None,
    read_rows: int = READ_ROWS,
    whole_snapshot: bool = True,
) -> WorkerEvents:
    """Read the events of ``[start_us, end_us)`` on the workers (see the module's
    description): from the archive's files ``paths`` (in the archive's order), each read in
    parts of whole row groups of at most about ``read_rows`` rows, and the store's events
    ``stored`` (:func:`stored_table`); ``partitions_for(accounts)`` gives the graph's
    partition count, ``buckets`` how many buckets the ids are hashed into (None:
    :func:`bucket_count` of the files' rows). Without ``whole_snapshot`` the partitions'
    out-arcs stay on the workers until :meth:`WorkerEvents.snapshot` asks for them, and
    :meth:`WorkerEvents.snapshot_around` gathers only some accounts' arcs."""
    parts = file_parts(archive, paths, read_rows)
    if buckets is None:
        rows = sum(part.rows for part in parts) + stored.num_rows
        buckets = bucket_count(rows, len(live_workers(client)))
    submit = client.submit
    read = [
        submit(_read_part, archive, part, start_us, end_us, buckets, pure=False) for part in parts
    ]
    store_parts = _bucketed(_ranked(stored, len(paths)), buckets)
    kept = [
        submit(
            _kept_once,
            *[submit(_item, r, b, pure=False) for r in read],
            store_parts[b],
            pure=False,
        )
        for b in range(buckets)
    ]
    del read  # each bucket holds its pieces now
    # A task, not data sent from here: Dask computes it again if its holder dies.
    listed = submit(
        _sorted_accounts, *[submit(_accounts_of, k, pure=False) for k in kept], pure=False
    )
    accounts = listed.result()
    names = np.asarray(accounts.to_pylist(), dtype=object)
    n = len(accounts)
    coded = [submit(_coded, k, listed, pure=False) for k in kept]
    del kept  # the coded buckets hold what is needed from here on
    chunk_futures = tuple(submit(_item, c, 0, pure=False) for c in coded)
    samples = tuple(submit(_item, c, 1, pure=False) for c in coded)
    load, count = submit(_summed_load, n, *chunk_futures, pure=False).result()
    del coded
    if n == 0:
        empty = Snapshot.from_interned(names, np.zeros(0, np.int64), np.zeros(0, np.int64))
        nothing = Partitioned(client, (), np.zeros(1, dtype=np.int64))
        return WorkerEvents(names, empty, nothing, (), 0, stored.num_rows)
    bounds = balanced_bounds(load + 1, max(1, min(partitions_for(n), n)))
    del load
    graph = build_graph((Partitioned(client, chunk_futures, bounds), n), out_arcs=True)
    assert graph.out_arcs is not None
    window = _snapshot(names, graph.out_arcs.gather()) if whole_snapshot else None
    return WorkerEvents(
        accounts=names,
        window=window,
        chunks=Partitioned(client, chunk_futures, bounds),
        samples=samples,
        count=count,
        from_store=stored.num_rows,
        graph=replace(graph, out_arcs=None),
        account_list=listed,
        arcs=None if whole_snapshot else graph.out_arcs,
    )


@dataclass(frozen=True)
class FilePart:
    """Whole row groups of one archive file, read by one task: the file's ``rank`` in the
    archive's order and the file's row number of the part's first row (an id's rows at
    equal times are kept in (rank, row) order)."""

    path: str
    rank: int
    row_groups: tuple[int, ...]
    first_row: int
    rows: int


def file_parts(archive: str, paths: Sequence[str], read_rows: int = READ_ROWS) -> list[FilePart]:
    """The read tasks' parts of ``paths``: each file's row groups in order, cut into runs of
    at most ``read_rows`` rows (a row group larger than that is a part of its own). Reads
    the files' footers only."""
    import pyarrow.parquet as pq

    filesystem = _filesystem(archive)
    parts: list[FilePart] = []
    for rank, path in enumerate(paths):
        with filesystem.open_input_file(path) as source:
            metadata = pq.ParquetFile(source).metadata
        first, rows = 0, 0
        groups: list[int] = []
        for group in range(metadata.num_row_groups):
            size = metadata.row_group(group).num_rows
            if groups and rows + size > read_rows:
                parts.append(FilePart(path, rank, tuple(groups), first, rows))
                first, groups, rows = first + rows, [], 0
            groups.append(group)
            rows += size
        if groups:
            parts.append(FilePart(path, rank, tuple(groups), first, rows))
    return parts


def bucket_count(events: int, workers: int) -> int:
    """How many buckets a window of about ``events`` events is hashed into: about
    :data:`BUCKET_EVENTS` events each (a bucket is deduplicated by one task, whose
    temporaries are a few times its size), at least two per worker, at most
    :data:`MAX_BUCKETS`."""
    wanted = max(2 * max(workers, 1), -(-events // BUCKET_EVENTS))
    return max(1, min(MAX_BUCKETS, wanted))


def stored_table(rows: Sequence[Any]) -> pa.Table:
    """The store's ``(event_id, time_us, actor, target, weight)`` rows as a table of the
    columns the workers read."""
    columns: list[tuple[Any, ...]] = list(zip(*rows, strict=True)) if rows else [()] * 5
    types = [pa.string(), pa.int64(), pa.string(), pa.string(), pa.float64()]
    return pa.table(
        [pa.array(values, type=kind) for values, kind in zip(columns, types, strict=True)],
        names=_READ,
    )


def stored_batches_table(batches: Iterable[Sequence[Any]]) -> pa.Table:
    """:func:`stored_table` of rows that come in batches
    (:func:`rolewatch.store.event_times.timed_event_batches`): each batch becomes columns
    before the next is fetched."""
    tables = [stored_table(batch) for batch in batches]
    return pa.concat_tables(tables) if tables else stored_table([])


# --- tasks (run on the workers) -------------------------------------------------------


def _item(values: Sequence[Any], i: int) -> Any:
    return values[i]


def _filesystem(archive: str) -> Any:
    """The filesystem ``archive`` lives on (a URL's, or the local one for a path)."""
    from pyarrow import fs

    if "://" in archive:
        return fs.FileSystem.from_uri(archive)[0]
    return fs.LocalFileSystem()


def _read_part(
    archive: str, part: FilePart, start_us: int, end_us: int, buckets: int
) -> list[pa.Table]:
    """One part of an archive file: its events of ``[start_us, end_us)``, ranked by file
    and row, split by the bucket of their id."""
    import pyarrow.parquet as pq

    from rolewatch.scale.archive import _micros

    with _filesystem(archive).open_input_file(part.path) as source:
        table = pq.ParquetFile(source).read_row_groups(list(part.row_groups), columns=_READ)
    time = _micros(table.column("time"))
    inside = np.flatnonzero((time >= start_us) & (time < end_us))
    table = table.set_column(1, "time", pa.array(time, pa.int64())).take(pa.array(inside))
    table = _ranked(table, part.rank, rows=inside + part.first_row)
    pieces = _bucketed(table, buckets)
    del table, time, inside
    _hand_back_freed_memory()
    return pieces


def _ranked(table: pa.Table, rank: int, rows: np.ndarray | None = None) -> pa.Table:
    """``table`` in the read columns and types, with its source's rank and each row's
    position there (the order in which equal times are kept)."""
    order = np.arange(table.num_rows, dtype=np.int64) if rows is None else rows
    table = table.select(_READ).cast(
        pa.schema(
            [
                ("id", pa.large_string()),
                ("time", pa.int64()),
                ("actor", pa.large_string()),
                ("target", pa.large_string()),
                ("weight", pa.float64()),
            ]
        )
    )
    return table.append_column(
        "rank", pa.array(np.full(table.num_rows, rank, np.int64))
    ).append_column("row", pa.array(order.astype(np.int64)))


def _bucketed(table: pa.Table, buckets: int) -> list[pa.Table]:
    bucket = hash_buckets(table.column("id"), buckets)
    order = np.argsort(bucket, kind="stable")
    cuts = np.searchsorted(bucket[order], np.arange(buckets + 1))
    return [table.take(pa.array(order[cuts[b] : cuts[b + 1]])) for b in range(buckets)]


def _kept_once(*pieces: pa.Table) -> pa.Table:
    """One bucket's events, each id once: its row earliest in (time, source, row) order."""
    table = pa.concat_tables(pieces)
    table = table.sort_by(
        [("id", "ascending"), ("time", "ascending"), ("rank", "ascending"), ("row", "ascending")]
    )
    ids = table.column("id").combine_chunks()
    first = np.ones(len(ids), dtype=bool)
    if len(ids) > 1:
        differs = pc.not_equal(ids.slice(1), ids.slice(0, len(ids) - 1))
        first[1:] = pc.fill_null(differs, True).to_numpy(zero_copy_only=False)
    kept = table.filter(pa.array(first)).select(_READ)
    del table, ids, first
    _hand_back_freed_memory()
    _check(kept)
    return kept


def _hand_back_freed_memory() -> None:
    """Return what Arrow's allocator freed to the system: it keeps freed memory for its own
    next allocations, which Dask counts as the worker's unmanaged memory (it restarted
    workers over their limit for it) and cannot spill."""
    pa.default_memory_pool().release_unused()


def _check(table: pa.Table) -> None:
    """The checks a snapshot makes of its events, with the first offending event's id."""
    weight = table.column("weight").to_numpy()
    bad = ~np.isfinite(weight) | (weight < 0)
    if bad.any():
        first = table.column("id")[int(np.flatnonzero(bad)[0])].as_py()
        raise ValueError(
            f"weight must be finite and >= 0: {int(bad.sum())} archived event(s) are not "
            f"(one is {first!r}); fix or drop those events in the archive"
        )
    same = pc.equal(table.column("actor"), table.column("target")).to_numpy(zero_copy_only=False)
    if same.any():
        first = table.column("id")[int(np.flatnonzero(same)[0])].as_py()
        raise ValueError(
            f"{int(same.sum())} archived event(s) have actor == target (one is {first!r}); an "
            "account cannot interact with itself, drop those events from the archive"
        )


def _accounts_of(table: pa.Table) -> pa.Array:
    both = pa.chunked_array(
        [*table.column("actor").chunks, *table.column("target").chunks], pa.large_string()
    )
    return pc.unique(both.combine_chunks())


def _sorted_accounts(*distinct: pa.Array) -> pa.Array:
    """The window's distinct accounts over every bucket, sorted: the snapshot's nodes (an
    account's position is its code)."""
    accounts = pc.unique(pa.chunked_array(distinct, pa.large_string()).combine_chunks())
    return accounts.take(pc.sort_indices(accounts))


def _coded(table: pa.Table, accounts: pa.Array) -> tuple[tuple[np.ndarray, ...], pa.Table]:
    """The bucket's events as account codes (positions in ``accounts``): the graph's chunk
    (actor, target, weight), and each event's time and id for the evidence's samples."""
    actor = pc.index_in(table.column("actor"), value_set=accounts)
    target = pc.index_in(table.column("target"), value_set=accounts)
    actor_code = actor.to_numpy().astype(EVENT_DTYPE)
    target_code = target.to_numpy().astype(EVENT_DTYPE)
    weight = table.column("weight").to_numpy()
    chunk = (actor_code, target_code, np.asarray(weight, dtype=np.float64))
    return chunk, table.select(["time", "id"])


def _summed_load(n: int, *chunks: tuple[np.ndarray, ...]) -> tuple[np.ndarray, int]:
    """Each account's event ends over every bucket's chunk, and the window's event count."""
    load = np.zeros(n, dtype=np.int64)
    for actor, target, _ in chunks:
        load += np.bincount(actor, minlength=n)
        load += np.bincount(target, minlength=n)
    return load, sum(len(chunk[0]) for chunk in chunks)


def _first_events(
    chunk: tuple[np.ndarray, ...], samples: pa.Table, rows: np.ndarray, per_account: int
) -> tuple[np.ndarray, np.ndarray, pa.Array]:
    """Of the bucket's events (``chunk``'s codes, ``samples``' times and ids) that involve
    ``rows`` (sorted codes), each code's first ``per_account`` in (time, id) order: (code,
    time, id) per event found."""
    parts = []
    for code in chunk[:2]:
        hit = np.flatnonzero(np.isin(code, rows))
        parts.append(
            pa.table(
                {
                    "node": pa.array(code[hit].astype(np.int64)),
                    "time": samples.column("time").take(pa.array(hit)),
                    "id": samples.column("id").take(pa.array(hit)),
                }
            )
        )
    table = pa.concat_tables(parts).sort_by(
        [("node", "ascending"), ("time", "ascending"), ("id", "ascending")]
    )
    node = table.column("node").to_numpy()
    starts = np.flatnonzero(np.r_[True, node[1:] != node[:-1]]) if node.size else node
    rank = np.arange(node.size) - np.repeat(starts, np.diff(np.r_[starts, node.size]))
    keep = pa.array(np.flatnonzero(rank < per_account))
    table = table.take(keep)
    return (
        table.column("node").to_numpy(),
        table.column("time").to_numpy(),
        table.column("id").combine_chunks().cast(pa.large_string()),
    )


def _arcs_touching(
    arcs: tuple[sp.csr_matrix, sp.csr_matrix], lo: int, codes: np.ndarray
) -> tuple[np.ndarray, ...]:
    """A partition's out-arcs (rows from code ``lo``) from or to one of ``codes`` (sorted):
    ``(actor, target, count, weight)``, codes of the whole window."""
    counts, weights = arcs
    actor = np.repeat(np.arange(counts.shape[0], dtype=np.int64) + lo, np.diff(counts.indptr))
    target = counts.indices.astype(np.int64)
    keep = np.isin(actor, codes) | np.isin(target, codes)
    return actor[keep], target[keep], counts.data[keep], weights.data[keep]


# --- in the closing process ------------------------------------------------------------


def _snapshot(nodes: np.ndarray, arcs: Sequence[tuple[sp.csr_matrix, sp.csr_matrix]]) -> Snapshot:
    """The snapshot of ``nodes`` from each partition's out-arcs (rows in partition order)."""
    n = len(nodes)
    index = np.int32 if n < 2**31 - 1 else np.int64
    counts = sp.vstack([a[0] for a in arcs], format="csr")
    weights = sp.vstack([a[1] for a in arcs], format="csr")
    for matrix in (counts, weights):
        matrix.indices = matrix.indices.astype(index, copy=False)
        matrix.indptr = matrix.indptr.astype(index, copy=False)
        matrix.sort_indices()
    return Snapshot(nodes=nodes, counts=counts, weights=weights)


def _snapshot_of_arcs(nodes: np.ndarray, pieces: Sequence[tuple[np.ndarray, ...]]) -> Snapshot:
    """The snapshot of ``nodes`` holding only the arcs ``pieces`` (each partition's
    ``(actor, target, count, weight)``, every arc in one piece), counts and weights on one
    pattern as a snapshot's are."""
    n = len(nodes)
    index = np.int32 if n < 2**31 - 1 else np.int64
    actor, target, count, weight = (np.concatenate(column) for column in zip(*pieces, strict=True))
    order = np.lexsort((target, actor))
    indptr = np.zeros(n + 1, dtype=index)
    indptr[1:] = np.cumsum(np.bincount(actor, minlength=n))
    columns = target[order].astype(index)
    return Snapshot(
        nodes=nodes,
        counts=sp.csr_matrix((count[order], columns, indptr), shape=(n, n)),
        weights=sp.csr_matrix((weight[order], columns.copy(), indptr.copy()), shape=(n, n)),
    )
