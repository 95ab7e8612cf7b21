"""The frozen recipe's features and the frozen basis's memberships of a window, computed on
a Dask cluster in partitions by account code range.

Base and egonet features come from :mod:`rolewatch.scale.graph`; the recursive aggregates of
ReFeX (Henderson et al., KDD 2011) are, per round, fetches of the round's parent columns
from the partitions owning each block's neighbours (in groups of columns small enough for
:data:`FETCH_BYTES`) and one sparse product per (direction, parent) on the block's adjacency
rows (the distributed form of
:meth:`rolewatch.engine.features.graph.SnapshotGraph.aggregate`: a sum over the neighbours,
the mean that sum times ``1 / degree``).

Worker memory stays bounded by what later rounds need: when a round ends, each of its
recipe features is binned with the frozen edges on the worker
(:func:`rolewatch.engine.features.binning.apply_bins`, one byte a value), its float64 values
are sent to the closing process (which fills the window's raw table, the evidence's
values), and the worker keeps float64 values only for the parents of later rounds and the
degrees. The memberships against the frozen basis run per partition from the bins
(:meth:`rolewatch.engine.basis.RoleBasis.memberships`); only their results come back.

A large window's float64 values (more than ``raw_here_max_bytes``) stay with the workers
instead: each round's values of a partition are written, rows contiguous, to a file in the
local directory of the worker that computed them (Dask's per-worker scratch space), and only
the file's name travels. Neither the closing process nor the workers' memory then holds an
n x f float64 table (at 30,000,000 events it would be about 5 GB, more than two 3 GB
workers hold beside their working arrays); the closing process reads back only the rows it
shows (the alerted accounts', :class:`WorkerRawFeatures`), a few pages of each file.
"""

from __future__ import annotations

import uuid
import weakref
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from rolewatch.engine.basis import Memberships, RoleBasis
from rolewatch.engine.features.binning import apply_bins, bin_dtype
from rolewatch.engine.features.graph import EGONET_FEATURES
from rolewatch.engine.features.recipe import FeatureRecipe, FeatureTable
from rolewatch.scale.graph import TRIANGLES, WindowGraph, fetch_columns, with_egonet
from rolewatch.scale.graph_steps import Block, add_columns
from rolewatch.scale.partitions import Partitioned, split_by_range

__all__ = [
    "MeasuredWindow",
    "RawValuesLost",
    "ScratchValues",
    "WorkerRawFeatures",
    "measure_window",
]

_DEGREE = {"in": "in_degree", "out": "out_degree", "all": "degree"}
FETCH_BYTES = 64 * 2**20  # parent values one partition fetches at once, at most
Layer = Sequence[tuple[str, str, str, str]]  # name, kind (sum / mean), direction, parent
SCRATCH_FOLDER = "rolewatch-raw-values"  # inside each worker's local directory


@dataclass(frozen=True)
class ScratchValues:
    """Where one partition's raw values of one round were written: a C-ordered
    rows x ``names`` float64 ``.npy`` file in the local directory of ``worker``."""

    worker: str
    path: str
    names: tuple[str, ...]


class RawValuesLost(RuntimeError):
    """A worker holding part of a window's raw values left the cluster."""


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


def _release_scratch(client: Any, paths: dict[str, list[str]]) -> None:
    """Ask each worker to delete its scratch files (a worker that is gone took its local
    directory with it)."""
    from distributed import fire_and_forget

    try:
        alive = set(client.scheduler_info().get("workers", {}))
        for worker, files in paths.items():
            if worker in alive:
                fire_and_forget(client.submit(_remove_scratch, files, workers=[worker], pure=False))
    except Exception:  # noqa: BLE001 - the client may be closed already at exit
        return


class WorkerRawFeatures:
    """A window's raw feature values left with the workers that computed them, read by rows.

    ``values[rows]`` (an integer or an array of account codes) gathers just those rows,
    n x f float64 in the recipe's column order, like indexing the in-process table: one
    small task per scratch file holding any of them, run on the worker that wrote it. The
    files live as long as this object (they are deleted when it is dropped). A worker lost
    after the computation takes its files with it (the window's events, scattered from the
    closing process, cannot be recomputed): reading them then raises
    :class:`RawValuesLost` and the close fails before anything is written, to be retried on
    the next tick.
    """

    def __init__(
        self,
        client: Any,
        bounds: np.ndarray,
        pieces: list[list[ScratchValues]],
        names: Sequence[str],
    ) -> None:
        self.client = client
        self.bounds = np.asarray(bounds, dtype=np.int64)
        self.pieces = pieces  # [partition][round]: where that round's values were written
        self.names = tuple(names)
        self.column = {name: j for j, name in enumerate(self.names)}
        self.shape = (int(self.bounds[-1]), len(self.names))
        files: dict[str, list[str]] = {}
        for piece in pieces:
            for scratch in piece:
                if scratch.path:
                    files.setdefault(scratch.worker, []).append(scratch.path)
        weakref.finalize(self, _release_scratch, client, files)

    @property
    def nbytes(self) -> int:
        """Bytes the values take on the workers' disks (as float64)."""
        return self.shape[0] * self.shape[1] * 8

    def __getitem__(self, rows: Any) -> np.ndarray:
        single = np.ndim(rows) == 0
        wanted = np.atleast_1d(np.asarray(rows, dtype=np.int64))
        n = self.shape[0]
        if wanted.size and (wanted.min() < -n or wanted.max() >= n):
            raise IndexError(f"row out of range for a window of {n} accounts")
        wanted = np.where(wanted < 0, wanted + n, wanted)
        out = np.empty((wanted.size, self.shape[1]))
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

    def _check_writers(self, scratches: Sequence[ScratchValues]) -> None:
        alive = set(self.client.scheduler_info().get("workers", {}))
        gone = sorted({s.worker for s in scratches} - alive)
        if gone:
            raise RawValuesLost(
                f"the Dask worker {gone[0]} that wrote part of the window's raw feature "
                "values is gone; nothing was written, and the next tick closes the window again"
            )


@dataclass(frozen=True)
class MeasuredWindow:
    """A window measured on the cluster, in the order of its accounts."""

    raw: np.ndarray | WorkerRawFeatures
    binned: np.ndarray
    members: Memberships
    triangles: np.ndarray | None = None  # per account, when the recipe counted them


def _add_aggregates(
    block: Block, layer: Layer, parents: Sequence[str], *pieces: np.ndarray
) -> Block:
    """Aggregates of ``parents`` from their values at the block's neighbours (fetched)."""
    fetched = np.empty((sum(len(piece) for piece in pieces), len(parents)), order="F")
    np.concatenate(pieces, axis=0, out=fetched)
    position = {name: k for k, name in enumerate(parents)}
    sums: dict[tuple[str, str], np.ndarray] = {}
    columns = {}
    for name, kind, direction, parent in layer:
        key = (direction, parent)
        if key not in sums:
            sums[key] = block.adjacency_of(direction) @ fetched[:, position[parent]]
        summed = sums[key]
        if kind == "mean":
            degree = block.columns[_DEGREE[direction]]
            inverse = np.divide(1.0, degree, out=np.zeros_like(degree), where=degree > 0)
            summed = summed * inverse
        columns[name] = summed
    return add_columns(block, columns)


def _settle(
    block: Block,
    finished: Sequence[str],
    keep: frozenset[str],
    edges: dict[str, np.ndarray],
    dtype: Any,
    to_scratch: bool,
) -> tuple[Block, dict[str, np.ndarray] | ScratchValues]:
    """Bin the finished recipe features, hand their float64 values back (or write them to
    this worker's scratch directory and hand back where), and keep float64 values only for
    the columns in ``keep``."""
    bins = dict(block.bins)
    raw = {}
    for name in finished:
        binned = np.empty(block.rows, dtype=dtype)
        apply_bins(block.columns[name], edges[name], out=binned)
        bins[name] = binned
        raw[name] = block.columns[name]
    columns = {name: values for name, values in block.columns.items() if name in keep}
    settled = replace(block, columns=columns, bins=bins)
    return settled, _write_scratch(raw) if to_scratch else raw


def parent_group(n: int) -> int:
    """Parent columns fetched at once: a partition's neighbours are at most the window's
    ``n`` accounts, so a group of float64 columns stays within :data:`FETCH_BYTES`."""
    return max(1, FETCH_BYTES // (8 * max(n, 1)))


class _Rounds:
    """The recipe's rounds on the cluster, and the raw table they fill in this process (or
    the futures of the raw values they leave on the workers)."""

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
        self.pending: list[Any] = []

    def keep_after(self, rnd: int) -> frozenset[str]:
        later = {str(d.parent) for d in self.recipe.features if d.round > rnd}
        return frozenset(later | set(_DEGREE.values()) | {TRIANGLES})

    def settle(self, blocks: Partitioned, rnd: int) -> Partitioned:
        finished = [d.name for d in self.recipe.features if d.round == rnd]
        keep = self.keep_after(rnd)
        settled = blocks.map(
            _settle, finished, keep, self.edges, self.dtype, self.raw is None
        ).pieces(2)
        self.collect()
        self.pending = [piece[1] for piece in settled]
        return Partitioned(self.client, tuple(piece[0] for piece in settled), blocks.bounds)

    def collect(self) -> None:
        """Copy the finished values the workers sent into the raw table, or note where
        they stay."""
        if self.raw is None:
            for j, scratch in enumerate(self.client.gather(self.pending)):
                self.left[j].append(scratch)
            self.pending = []
            return
        bounds = self.graph.blocks.bounds
        for j, values in enumerate(self.client.gather(self.pending)):
            for name, column in values.items():
                self.raw[bounds[j] : bounds[j + 1], self.column[name]] = column
        self.pending = []

    def values(self) -> np.ndarray | WorkerRawFeatures:
        if self.raw is not None:
            return self.raw
        return WorkerRawFeatures(
            self.client, self.graph.blocks.bounds, self.left, self.recipe.names
        )

    def aggregate(self, blocks: Partitioned, rnd: int) -> Partitioned:
        layer = [
            (d.name, *d.op.split("_"), str(d.parent))
            for d in self.recipe.features
            if d.round == rnd
        ]
        parents = sorted({parent for *_, parent in layer})
        size = parent_group(self.graph.n)
        for g in range(0, len(parents), size):
            group = parents[g : g + size]
            part = [entry for entry in layer if entry[3] in group]
            pieces = fetch_columns(self.graph, blocks, group)
            blocks = Partitioned(
                self.client,
                tuple(
                    self.client.submit(_add_aggregates, block, part, group, *pieces[i], pure=False)
                    for i, block in enumerate(blocks.futures)
                ),
                blocks.bounds,
            )
        return blocks


def _measure_block(block: Block, names: Sequence[str], version: str, basis: RoleBasis) -> tuple:
    """Frozen bins and memberships of one block, by the engine's own function, and its
    triangles: ``(binned, mixture, loadings, error, triangles)`` (triangles empty when the
    recipe has no egonet feature)."""
    first = block.bins[names[0]] if names else np.zeros(block.rows, dtype=np.uint8)
    binned = np.empty((block.rows, len(names)), dtype=first.dtype, order="F")
    for j, name in enumerate(names):
        binned[:, j] = block.bins[name]
    table = FeatureTable(
        nodes=np.arange(block.lo, block.lo + block.rows),  # codes: the basis reads no id
        names=tuple(names),
        raw=np.empty((block.rows, 0)),
        binned=binned,
        recipe_version=version,
    )
    members = basis.memberships(table)
    triangles = block.columns.get(TRIANGLES, np.zeros(0))
    return binned, members.mixture, members.loadings, members.error, triangles


def measure_window(
    graph: WindowGraph,
    recipe: FeatureRecipe,
    basis: RoleBasis,
    *,
    raw_here_max_bytes: int | None = None,
) -> MeasuredWindow:
    """The frozen recipe's raw values and bins, and the memberships, of every account.

    The raw values come to this process when they take at most ``raw_here_max_bytes``
    (None: always); above it they stay on the workers (:class:`WorkerRawFeatures`).
    """
    raw_bytes = graph.n * len(recipe.names) * 8
    raw_here = raw_here_max_bytes is None or raw_bytes <= raw_here_max_bytes
    rounds = _Rounds(graph, recipe, raw_here=raw_here)
    uses_egonet = any(d.parent is None and d.op in EGONET_FEATURES for d in recipe.features)
    blocks = with_egonet(graph) if uses_egonet else graph.blocks
    for rnd in rounds.rounds:
        if rnd > 0:
            blocks = rounds.aggregate(blocks, rnd)
        blocks = rounds.settle(blocks, rnd)
    parts = blocks.map(_measure_block, list(recipe.names), recipe.version, basis)
    rounds.collect()
    del blocks
    gathered = parts.gather()
    binned, mixture, loadings, error, triangles = (
        np.concatenate([part[k] for part in gathered], axis=0) for k in range(5)
    )
    if binned.shape[0] != graph.n:
        raise RuntimeError(
            f"the Dask close returned {binned.shape[0]} rows for {graph.n} accounts; the "
            "close is retried on the next tick"
        )
    members = Memberships(loadings=loadings, mixture=mixture, error=error)
    return MeasuredWindow(
        raw=rounds.values(),
        binned=np.asfortranarray(binned),
        members=members,
        triangles=triangles if uses_egonet else None,
    )
