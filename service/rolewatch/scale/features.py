"""The frozen recipe's features and the frozen basis's memberships of a window, computed on
a Dask cluster in partitions by account code range.

Base and egonet features come from :mod:`rolewatch.scale.graph`; the recursive aggregates of
ReFeX (Henderson et al., KDD 2011) are, per round, fetches of the round's parent columns
from the partitions owning each block's neighbours (in groups of columns small enough for
:data:`FETCH_BYTES`) and one sparse product per (direction, parent) on the block's adjacency
rows (the distributed form of
:meth:`rolewatch.engine.features.graph.SnapshotGraph.aggregate`: a sum over the neighbours,
the mean that sum times ``1 / degree``).

Worker memory stays bounded by what later rounds need. A partition's adjacency block is
built once and never copied; every step (the base counts, the egonet features, each group of
a round's aggregates) makes one new result of a few columns per partition and settles it at
once: each recipe feature is binned with the frozen edges on the worker
(:func:`rolewatch.engine.features.binning.apply_bins`, one byte a value), its float64 values
are sent to the closing process (which fills the window's raw table, the evidence's
values), and the worker keeps float64 values only for the parents of later rounds. At most
two groups of parents are on the cluster at once, so a worker never holds the fetched
values of every group. The memberships against the frozen basis run per partition from the
bins (:meth:`rolewatch.engine.basis.RoleBasis.memberships`); only their results come back.

A large window's float64 values (more than ``raw_here_max_bytes``) stay with the workers
instead: each round's values of a partition are written, rows contiguous, to a file in the
local directory of the worker that computed them (Dask's per-worker scratch space), and only
the file's name travels; so are each partition's bins once its memberships are fitted.
Neither the closing process nor the workers' memory then holds the n x f feature table (at
30,000,000 events about 5 GB of float64 and 0.6 GB of bins, more than two 3 GB workers hold
beside their working arrays); the closing process reads back only the rows it shows (the
alerted accounts' raw values, :class:`WorkerFeatureRows`), a few pages of each file.
"""

from __future__ import annotations

import operator
import threading
import uuid
import weakref
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from rolewatch.engine.basis import Memberships, RoleBasis
from rolewatch.engine.features.binning import apply_bins, bin_dtype
from rolewatch.engine.features.graph import EGONET_FEATURES, LOCAL_FEATURES
from rolewatch.engine.features.recipe import FeatureRecipe, FeatureTable
from rolewatch.scale.graph import TRIANGLES, WindowGraph, egonet_table, fetch_columns
from rolewatch.scale.graph_steps import Block
from rolewatch.scale.partitions import Partitioned, split_by_range
from rolewatch.scale.workers import live_workers

__all__ = [
    "Columns",
    "Layer",
    "MeasuredWindow",
    "aggregate_columns",
    "fetch_parents",
    "parent_group",
    "FeatureRowsLost",
    "ScratchValues",
    "WorkerFeatureRows",
    "measure_window",
]

_DEGREE = {"in": "in_degree", "out": "out_degree", "all": "degree"}
FETCH_BYTES = 64 * 2**20  # parent values one partition fetches at once, at most
GROUPS_AHEAD = 1  # groups of parents left running when the next is sent (2 at once at most)
Layer = Sequence[tuple[str, str, str, str]]  # name, kind (sum / mean), direction, parent
SCRATCH_FOLDER = "rolewatch-raw-values"  # inside each worker's local directory


@dataclass(frozen=True)
class ScratchValues:
    """Where one partition's raw values of one round were written: a C-ordered
    rows x ``names`` float64 ``.npy`` file in the local directory of ``worker``."""

    worker: str
    path: str
    names: tuple[str, ...]


class FeatureRowsLost(RuntimeError):
    """A worker holding part of a window's raw values or bins left the cluster."""


def _write_scratch(raw: dict[str, np.ndarray]) -> ScratchValues:
    """Write a partition's finished raw columns to this worker's local directory."""
    from distributed import get_worker

    worker = get_worker()
    if not raw:
        return ScratchValues(worker=worker.address, path="", names=())
    folder = Path(worker.local_directory) / SCRATCH_FOLDER
    folder.mkdir(exist_ok=True)
    path = folder / f"{uuid.uuid4().hex}.npy"
    np.save(path, np.column_stack(list(raw.values())))
    return ScratchValues(worker=worker.address, path=str(path), names=tuple(raw))


def _read_scratch(path: str, rows: np.ndarray) -> np.ndarray:
    """Rows ``rows`` (local to the partition) of one scratch file, read through a memory
    map so that only their pages are touched."""
    return np.asarray(np.load(path, mmap_mode="r")[rows])


def _remove_scratch(paths: Sequence[str]) -> None:
    for path in paths:
        Path(path).unlink(missing_ok=True)


def _release_scratch_soon(client: Any, paths: dict[str, list[str]]) -> None:
    """:func:`_release_scratch` on a thread of its own. This is the values' finalizer, and
    the garbage collector may run it on any thread, an event-loop thread included: on the
    client's own, a call that waits for the scheduler fails (and the files would stay); on
    the one running an in-process scheduler, it would wait for that scheduler for ever."""
    threading.Thread(
        target=_release_scratch, args=(client, paths), name="rolewatch-scratch", daemon=True
    ).start()


def _release_scratch(client: Any, paths: dict[str, list[str]]) -> None:
    """Ask each worker to delete its scratch files (a worker that is gone took its local
    directory with it)."""
    from distributed import fire_and_forget

    try:
        alive = live_workers(client)
        for worker, files in paths.items():
            if worker in alive:
                fire_and_forget(client.submit(_remove_scratch, files, workers=[worker], pure=False))
    except Exception:  # noqa: BLE001 - the client may be closed already at exit
        return


class WorkerFeatureRows:
    """A window's raw feature values (float64) or bins (``dtype``: the bins' unsigned
    integers) left with the workers that computed them, read by rows.

    ``values[rows]`` (an integer or an array of account codes) gathers just those rows,
    n x f in the recipe's column order, like indexing the in-process table: one
    small task per scratch file holding any of them, run on the worker that wrote it. The
    files live as long as this object (they are deleted when it is dropped). A worker lost
    after the computation takes its files with it (the window's events, scattered from the
    closing process, cannot be recomputed): reading them then raises
    :class:`FeatureRowsLost` and the close fails before anything is written, to be retried on
    the next tick.
    """

    def __init__(
        self,
        client: Any,
        bounds: np.ndarray,
        pieces: list[list[ScratchValues]],
        names: Sequence[str],
        dtype: Any = np.float64,
    ) -> None:
        self.client = client
        self.bounds = np.asarray(bounds, dtype=np.int64)
        self.pieces = pieces  # [partition][step]: where that step's values were written
        self.dtype = np.dtype(dtype)
        self.names = tuple(names)
        self.column = {name: j for j, name in enumerate(self.names)}
        self.shape = (int(self.bounds[-1]), len(self.names))
        files: dict[str, list[str]] = {}
        for piece in pieces:
            for scratch in piece:
                if scratch.path:
                    files.setdefault(scratch.worker, []).append(scratch.path)
        weakref.finalize(self, _release_scratch_soon, client, files)

    @property
    def nbytes(self) -> int:
        """Bytes the values take on the workers' disks."""
        return self.shape[0] * self.shape[1] * self.dtype.itemsize

    def __getitem__(self, rows: Any) -> np.ndarray:
        single = np.ndim(rows) == 0
        wanted = np.atleast_1d(np.asarray(rows, dtype=np.int64))
        n = self.shape[0]
        if wanted.size and (wanted.min() < -n or wanted.max() >= n):
            raise IndexError(f"row out of range for a window of {n} accounts")
        wanted = np.where(wanted < 0, wanted + n, wanted)
        out = np.empty((wanted.size, self.shape[1]), dtype=self.dtype)
        reads = [
            (positions, wanted[positions] - self.bounds[j], scratch)
            for j, positions in enumerate(split_by_range(wanted, self.bounds))
            if positions.size
            for scratch in self.pieces[j]
            if scratch.names
        ]
        self._check_writers([scratch for *_, scratch in reads])
        futures = [
            self.client.submit(
                _read_scratch,
                scratch.path,
                local,
                workers=[scratch.worker],
                allow_other_workers=False,
                pure=False,
            )
            for _, local, scratch in reads
        ]
        for (positions, _, scratch), values in zip(reads, self.client.gather(futures), strict=True):
            columns = np.array([self.column[name] for name in scratch.names])
            out[np.ix_(positions, columns)] = values
        return out[0] if single else out

    def readable(self) -> bool:
        """Whether every worker that wrote these values is still in the cluster (and the
        client still connected)."""
        try:
            alive = live_workers(self.client)
        except Exception:  # noqa: BLE001 - a closed client cannot say, so: not readable
            return False
        return all(s.worker in alive for piece in self.pieces for s in piece if s.path)

    def _check_writers(self, scratches: Sequence[ScratchValues]) -> None:
        alive = live_workers(self.client)
        gone = sorted({s.worker for s in scratches} - alive)
        if gone:
            raise FeatureRowsLost(
                f"the Dask worker {gone[0]} that wrote part of the window's feature values "
                "is gone; nothing was written, and the next tick closes the window again"
            )


@dataclass(frozen=True)
class MeasuredWindow:
    """A window measured on the cluster, in the order of its accounts."""

    raw: np.ndarray | WorkerFeatureRows
    binned: np.ndarray | WorkerFeatureRows  # with the raw values: both here or both there
    members: Memberships
    triangles: np.ndarray | None = None  # per account, when the recipe counted them


Columns = dict[str, np.ndarray]  # float64 values of one partition's rows, by feature name


def _settle(
    columns: Columns,
    edges: dict[str, np.ndarray],
    keep: frozenset[str],
    dtype: Any,
    to_scratch: bool,
) -> tuple[Columns, Columns, Columns | ScratchValues]:
    """A partition's newly computed columns, settled: ``(kept, bins, raw)``.

    Every recipe feature among them is binned with its frozen edges (``bins``, one byte a
    value), its float64 values are handed back (``raw``: sent to the closing process, or
    written to this worker's scratch directory and handed back as where), and only the
    columns in ``keep`` (later rounds' parents, the triangles) stay as float64 (``kept``).
    """
    bins, raw = {}, {}
    for name, values in columns.items():
        if name in edges:
            binned = np.empty(values.size, dtype=dtype)
            apply_bins(values, edges[name], out=binned)
            bins[name], raw[name] = binned, values
    kept = {name: values for name, values in columns.items() if name in keep}
    return kept, bins, _write_scratch(raw) if to_scratch else raw


def _aggregates(
    block: Block,
    layer: Layer,
    sources: Sequence[Sequence[str]],
    settle: tuple,
    *pieces: np.ndarray,
) -> tuple[Columns, Columns, Columns | ScratchValues]:
    """One group of a round's aggregates on one partition (:func:`aggregate_columns`),
    settled (:func:`_settle`)."""
    return _settle(aggregate_columns(block, layer, sources, *pieces), *settle)


def aggregate_columns(
    block: Block, layer: Layer, sources: Sequence[Sequence[str]], *pieces: np.ndarray
) -> Columns:
    """One group of a round's aggregates on one partition, in float64.

    ``pieces`` are the parents' values at the block's neighbours, one piece per partition
    for each source (a Dask result holding some of the parents, ``sources`` naming them
    in order); ``layer`` the group's features, each a sum or mean of one parent over one
    direction's neighbours.
    """
    parents = [name for names in sources for name in names]
    fetched = np.empty((block.need.size, len(parents)), order="F")
    per_source = len(pieces) // max(len(sources), 1)
    column = 0
    for s, names in enumerate(sources):
        part = pieces[s * per_source : (s + 1) * per_source]
        np.concatenate(part, axis=0, out=fetched[:, column : column + len(names)])
        column += len(names)
    position = {name: k for k, name in enumerate(parents)}
    adjacency: dict[str, Any] = {}
    sums: dict[tuple[str, str], np.ndarray] = {}
    columns: Columns = {}
    for name, kind, direction, parent in layer:
        key = (direction, parent)
        if key not in sums:
            if direction not in adjacency:
                adjacency[direction] = block.adjacency_of(direction)
            sums[key] = adjacency[direction] @ fetched[:, position[parent]]
        summed = sums[key]
        if kind == "mean":
            degree = block.columns[_DEGREE[direction]]
            inverse = np.divide(1.0, degree, out=np.zeros_like(degree), where=degree > 0)
            summed = summed * inverse
        columns[name] = summed
    return columns


def fetch_parents(
    graph: WindowGraph, where: dict[str, Partitioned], parents: Sequence[str]
) -> tuple[list[list[list[Any]]], list[list[str]]]:
    """The values of ``parents`` each partition's neighbours hold, fetched from the
    results holding them (``where``: the Dask result of each parent), one fetch per such
    result: ``(fetched, names)``, ``fetched[s][i][j]`` the piece partition ``i`` gets from
    partition ``j`` of source ``s``, ``names[s]`` that source's parents in order (what
    :func:`aggregate_columns` takes)."""
    sources: dict[int, tuple[Partitioned, list[str]]] = {}
    for parent in parents:
        table = where[parent]
        sources.setdefault(id(table), (table, []))[1].append(parent)
    fetched = [fetch_columns(graph, table, names) for table, names in sources.values()]
    return fetched, [names for _, names in sources.values()]


def _need_size(block: Block) -> int:
    return int(block.need.size)


def parent_group(need: int) -> int:
    """Parent columns fetched at once when a partition's neighbours number at most
    ``need``, so that a group of float64 columns stays within :data:`FETCH_BYTES`."""
    return max(1, FETCH_BYTES // (8 * max(need, 1)))


class _Rounds:
    """The recipe's rounds on the cluster, and the raw table they fill in this process (or
    the scratch files of the raw values they leave on the workers).

    Every step makes, per partition, one new Dask result of a few columns and settles it
    at once (:func:`_settle`): the bins are kept apart (``self.bins``), the float64 values
    are kept only while a later round needs them (``self.where``: which result holds each
    such column). Groups of parents go to the cluster at most :data:`GROUPS_AHEAD` ahead of
    the last finished one, so the workers never hold the fetched values of every group at
    once.
    """

    def __init__(self, graph: WindowGraph, recipe: FeatureRecipe, *, raw_here: bool) -> None:
        self.graph, self.recipe = graph, recipe
        self.client = graph.blocks.client
        self.rounds = sorted({d.round for d in recipe.features})
        self.column = {name: j for j, name in enumerate(recipe.names)}
        self.raw = np.zeros((graph.n, len(recipe.names)), order="F") if raw_here else None
        self.left: list[list[ScratchValues]] = [[] for _ in range(graph.blocks.partitions)]
        self.edges = dict(zip(recipe.names, recipe.feature_edges, strict=True))
        n_bins = 1 + max((e.size for e in recipe.feature_edges), default=0)
        self.dtype = bin_dtype(n_bins)
        self.where: dict[str, Partitioned] = {}  # float64 columns still kept, by name
        self.bins: list[Partitioned] = []
        self.in_flight: list[list[Any]] = []  # settled results not yet waited for

    def keep_after(self, rnd: int) -> frozenset[str]:
        later = {str(d.parent) for d in self.recipe.features if d.round > rnd}
        return frozenset(later | {TRIANGLES})

    def _settling(self, rnd: int) -> tuple:
        return self.edges, self.keep_after(rnd), self.dtype, self.raw is None

    def add(self, settled: list[Any], names: Sequence[str], rnd: int) -> None:
        """Track one step's settled results (one ``(kept, bins, raw)`` future per
        partition) holding the columns ``names``."""
        bounds = self.graph.blocks.bounds
        items = Partitioned(self.client, tuple(settled), bounds).pieces(3)
        kept = Partitioned(self.client, tuple(item[0] for item in items), bounds)
        for name in self.keep_after(rnd).intersection(names):
            self.where[name] = kept
        self.bins.append(Partitioned(self.client, tuple(item[1] for item in items), bounds))
        self.in_flight.append([item[2] for item in items])

    def settle_first(self, tables: Sequence[tuple[Partitioned, Sequence[str]]]) -> None:
        """Round 0: settle the base (and egonet) columns."""
        for table, names in tables:
            settled = table.map(_settle, *self._settling(0))
            self.add(list(settled.futures), names, 0)
        self.collect(keep=0)

    def collect(self, keep: int) -> None:
        """Wait for all but the last ``keep`` steps in flight; copy the finished values they
        sent into the raw table, or note where they were written."""
        bounds = self.graph.blocks.bounds
        while len(self.in_flight) > keep:
            raws = self.client.gather(self.in_flight.pop(0))
            for j, values in enumerate(raws):
                if self.raw is None:
                    self.left[j].append(values)
                    continue
                for name, column in values.items():
                    self.raw[bounds[j] : bounds[j + 1], self.column[name]] = column

    def values(self) -> np.ndarray | WorkerFeatureRows:
        if self.raw is not None:
            return self.raw
        return WorkerFeatureRows(
            self.client, self.graph.blocks.bounds, self.left, self.recipe.names
        )

    def aggregate(self, rnd: int, group_size: int) -> None:
        """Round ``rnd``'s aggregates, in groups of at most ``group_size`` parents."""
        layer = [
            (d.name, *d.op.split("_"), str(d.parent))
            for d in self.recipe.features
            if d.round == rnd
        ]
        parents = sorted({parent for *_, parent in layer})
        blocks, settling = self.graph.blocks, self._settling(rnd)
        for g in range(0, len(parents), group_size):
            group = parents[g : g + group_size]
            part = [entry for entry in layer if entry[3] in group]
            fetched, names = fetch_parents(self.graph, self.where, group)
            settled = [
                self.client.submit(
                    _aggregates,
                    block,
                    part,
                    names,
                    settling,
                    *[piece for pieces in fetched for piece in pieces[i]],
                    pure=False,
                )
                for i, block in enumerate(blocks.futures)
            ]
            self.add(settled, [entry[0] for entry in part], rnd)
            self.collect(keep=GROUPS_AHEAD)
        self.collect(keep=0)
        later = self.keep_after(rnd)
        self.where = {name: table for name, table in self.where.items() if name in later}


def _measure_block(
    block: Block,
    names: Sequence[str],
    version: str,
    basis: RoleBasis,
    to_scratch: bool,
    *bins: Columns,
) -> tuple:
    """Frozen memberships of one block's rows, by the engine's own function, from the
    bins of its steps: ``(binned, mixture, loadings, error)``; with ``to_scratch`` the bins
    are written to this worker's scratch directory and ``binned`` says where."""
    held = {name: values for part in bins for name, values in part.items()}
    if to_scratch:
        where = _write_scratch({name: held[name] for name in names})
    first = held[names[0]] if names else np.zeros(block.rows, dtype=np.uint8)
    binned = np.empty((block.rows, len(names)), dtype=first.dtype, order="F")
    for j, name in enumerate(names):
        binned[:, j] = held[name]
    table = FeatureTable(
        nodes=np.arange(block.lo, block.lo + block.rows),  # codes: the basis reads no id
        names=tuple(names),
        raw=np.empty((block.rows, 0)),
        binned=binned,
        recipe_version=version,
    )
    members = basis.memberships(table)
    return where if to_scratch else binned, members.mixture, members.loadings, members.error


def measure_window(
    graph: WindowGraph,
    recipe: FeatureRecipe,
    basis: RoleBasis,
    *,
    raw_here_max_bytes: int | None = None,
) -> MeasuredWindow:
    """The frozen recipe's raw values and bins, and the memberships, of every account.

    The raw values and the bins come to this process when the raw values take at most
    ``raw_here_max_bytes`` (None: always); above it both stay on the workers
    (:class:`WorkerFeatureRows`): the closing process needs neither for its scores, only
    the alerted accounts' raw rows for their evidence.
    """
    raw_bytes = graph.n * len(recipe.names) * 8
    raw_here = raw_here_max_bytes is None or raw_bytes <= raw_here_max_bytes
    rounds = _Rounds(graph, recipe, raw_here=raw_here)
    uses_egonet = any(d.parent is None and d.op in EGONET_FEATURES for d in recipe.features)
    first: list[tuple[Partitioned, Sequence[str]]] = [(graph.base, LOCAL_FEATURES)]
    if uses_egonet:
        first.append((egonet_table(graph), (*EGONET_FEATURES, TRIANGLES)))
    rounds.settle_first(first)
    del first
    triangles = rounds.where.get(TRIANGLES)
    need = max(graph.blocks.map(_need_size).gather(), default=0)
    for rnd in rounds.rounds:
        if rnd > 0:
            rounds.aggregate(rnd, parent_group(need))
    parts = graph.blocks.map(
        _measure_block, list(recipe.names), recipe.version, basis, not raw_here, *rounds.bins
    )
    gathered = parts.gather()
    mixture, loadings, error = (
        np.concatenate([part[k] for part in gathered], axis=0) for k in range(1, 4)
    )
    if mixture.shape[0] != graph.n:
        raise RuntimeError(
            f"the Dask close returned {mixture.shape[0]} rows for {graph.n} accounts; the "
            "close is retried on the next tick"
        )
    binned: np.ndarray | WorkerFeatureRows
    if raw_here:
        binned = np.asfortranarray(np.concatenate([part[0] for part in gathered], axis=0))
    else:
        pieces = [[part[0]] for part in gathered]
        binned = WorkerFeatureRows(
            graph.blocks.client, graph.blocks.bounds, pieces, recipe.names, rounds.dtype
        )
    del gathered
    members = Memberships(loadings=loadings, mixture=mixture, error=error)
    return MeasuredWindow(
        raw=rounds.values(),
        binned=binned,
        members=members,
        triangles=_gather_column(triangles, TRIANGLES) if triangles is not None else None,
    )


def _gather_column(table: Partitioned, name: str) -> np.ndarray:
    """One float64 column of every partition, in account order, in this process."""
    return np.concatenate(table.map(operator.getitem, name).gather())
