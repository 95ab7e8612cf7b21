"""The one place a window close chooses where its features and memberships are computed:
in this process (``compute = "local"``) or on a Dask cluster (``compute = "dask"``).

With ``dask_scheduler`` set the close connects to that scheduler; without it, the first Dask
close starts a local cluster inside this process (worker processes on this machine) and
keeps it for the closes after it.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import fields
from typing import Any, TypeVar

from sqlalchemy.engine import Connection

from rolewatch.config import Settings
from rolewatch.engine.basis import Memberships
from rolewatch.engine.features.recipe import FeatureTable
from rolewatch.engine.pairs import KnownPairs, PairHistory
from rolewatch.engine.scoring import ShiftPolicy, WindowScores
from rolewatch.engine.snapshot import Snapshot
from rolewatch.engine.ties import TieCounts, tie_counts
from rolewatch.pipeline.compute import (
    Measure,
    Measured,
    ScoreInputs,
    WindowResult,
    measure_locally,
    membership_columns,
)
from rolewatch.pipeline.loading import ClosingEvents, WindowEvents
from rolewatch.pipeline.model import FrozenModel, fit_model
from rolewatch.pipeline.recent import MAX_KEPT_BYTES
from rolewatch.scale.archive_events import WorkerEvents
from rolewatch.scale.workers import live_workers
from rolewatch.store.pairs import known_pair_parts, known_pair_windows, window_pair_keys

__all__ = [
    "ACCOUNTS_PER_PARTITION",
    "DASK_ATTEMPTS",
    "DaskDataLost",
    "DaskMeasure",
    "RAW_HERE_MAX_BYTES",
    "ScaleExtraMissing",
    "close_clients",
    "dask_client",
    "fit_for",
    "keeps_memberships",
    "known_pairs_for",
    "lost_data",
    "measure_for",
    "record_outputs",
]

# Accounts a partition of the close gets at least, below dask_partitions (measured on 2 cores:
# a 1M-event window, 156,000 accounts, measured in 5-7 s on 2 partitions, 7-9 s on 8).
ACCOUNTS_PER_PARTITION = 250_000
_CLIENTS: dict[str | None, Any] = {}
_LOCK = threading.Lock()
# Attempts of one window's Dask computation when the cluster loses its data (a worker died
# holding the window's scattered event chunks, or a task killed its workers repeatedly).
DASK_ATTEMPTS = 3
# Seconds to wait before the next attempt, times the attempts made: the scheduler may still
# list a worker that has just died (until it sees the connection drop), and a nanny needs a
# moment to start its replacement (common practice, no source).
RETRY_PAUSE_S = 1.0
# A window's raw feature values come to the closing process up to this size (the size the
# closer keeps for the next window's evidence); above it they stay on the workers and the
# evidence reads the alerted accounts' rows from there.
RAW_HERE_MAX_BYTES = MAX_KEPT_BYTES
# Seconds between two checks that a window's event chunks still have a holder while its
# blocks are built (common practice, no source).
BUILD_POLL_S = 5.0
log = logging.getLogger("rolewatch.scale")
_Result = TypeVar("_Result")


class ScaleExtraMissing(RuntimeError):
    """Dask or pyarrow is not installed."""


def _require_dask() -> None:
    try:
        import dask.dataframe  # noqa: F401
        import distributed  # noqa: F401
        import pyarrow  # noqa: F401
    except ImportError as error:
        raise ScaleExtraMissing(
            f"compute = dask needs Dask and pyarrow ({error}); install them with "
            "pip install 'rolewatch[scale]', or set compute = local"
        ) from None


def dask_client(scheduler: str | None) -> Any:
    """A connected Dask client for ``scheduler`` (None: an in-process local cluster),
    made once per process and reused while it stays connected."""
    _require_dask()
    from distributed import Client, LocalCluster

    with _LOCK:
        client = _CLIENTS.get(scheduler)
        if client is not None and client.status == "running":
            return client
        if scheduler:
            client = Client(scheduler, timeout="30s", set_as_default=False)
        else:
            cluster = LocalCluster(threads_per_worker=1, dashboard_address=None)
            client = Client(cluster, set_as_default=False)
        _CLIENTS[scheduler] = client
        return client


def close_clients() -> None:
    """Close every client this process made (and the local cluster it started, if any)."""
    from rolewatch.scale.held_pairs import forget_held_pairs

    forget_held_pairs()  # its futures belong to a client closed here
    with _LOCK:
        for client in _CLIENTS.values():
            cluster = client.cluster
            client.close()
            if cluster is not None:
                cluster.close()
        _CLIENTS.clear()


class DaskDataLost(RuntimeError):
    """The cluster lost a window's data on every attempt; the close raises before writing
    anything and the next scheduler tick closes the window again."""


def _lost_data_errors() -> tuple[type[BaseException], ...]:
    """What a dying worker makes a close raise: its results' futures cancelled, a task
    that killed its workers, or a connection closed under a transfer (the scheduler sending
    the events to a worker that has just died drops the client's request with it)."""
    from concurrent.futures import CancelledError  # one future's or several's, waited for

    from distributed.comm.core import CommClosedError
    from distributed.scheduler import KilledWorker

    return (CancelledError, KilledWorker, CommClosedError)


def lost_data(error: BaseException) -> bool:
    """Whether ``error`` is what a dying worker makes a close raise: one of
    :func:`_lost_data_errors`, or the scheduler's ``KeyError`` naming a worker's address
    (a request, such as a scatter's replication, looking up a worker the scheduler had just
    removed: distributed raises the missing address itself)."""
    if isinstance(error, _lost_data_errors()):
        return True
    return (
        type(error) is KeyError
        and len(error.args) == 1
        and isinstance(error.args[0], str)
        and "://" in error.args[0]
    )


class DaskMeasure:
    """Computes a window's feature table and memberships on a Dask cluster
    (:func:`rolewatch.pipeline.compute.measure_locally` is the in-process equivalent), and
    with :meth:`with_ties` its tie cells too (:mod:`rolewatch.scale.ties`; in-process:
    :func:`rolewatch.engine.ties.tie_counts`), and with :meth:`score` the window's shift
    scores (:mod:`rolewatch.scale.scoring`; in-process:
    :func:`rolewatch.engine.scoring.score_window`).

    A worker that dies mid-computation loses its intermediate tables (Dask recomputes them
    on the other workers) and the window's event chunks and known-pair ranges this process
    scattered to it (which Dask cannot recompute: the computation's futures are cancelled).
    The computation is then started again from the events, up to ``attempts`` times in all.
    Events the workers read from the archive (:class:`WorkerEvents`) are task results instead,
    which Dask reads again when a worker holding one is lost.
    """

    def __init__(
        self,
        client: Any,
        partitions: int,
        accounts_per_partition: int | None = None,
        attempts: int = DASK_ATTEMPTS,
        raw_here_max_bytes: int | None = RAW_HERE_MAX_BYTES,
    ) -> None:
        self.client = client
        self.partitions = partitions
        self.accounts_per_partition = accounts_per_partition
        self.attempts = attempts
        self.raw_here_max_bytes = raw_here_max_bytes

    def partitions_for(self, accounts: int) -> int:
        """``partitions``, or with ``accounts_per_partition`` set, as few as give each
        partition about that many accounts, at least one per worker and at most
        ``partitions`` (fewer, larger blocks: fewer tasks on small windows)."""
        if self.accounts_per_partition is None:
            return self.partitions
        workers = max(1, len(live_workers(self.client)))
        wanted = max(workers, -(-accounts // self.accounts_per_partition))
        return max(1, min(self.partitions, wanted))

    def __call__(
        self, model: FrozenModel, snapshot: Snapshot, events: ClosingEvents
    ) -> tuple[FeatureTable, Memberships]:
        if snapshot.n_nodes == 0:
            return measure_locally(model, snapshot, events)
        table, members, _ties = self._measure(model, snapshot, events, None)
        return table, members

    def with_ties(
        self, model: FrozenModel, snapshot: Snapshot, events: ClosingEvents, known: PairHistory
    ) -> Measured:
        """The feature table, memberships and the tie cells against ``known``, all counted
        on the cluster from the same partitioned graph."""
        if snapshot.n_nodes == 0:
            table, members = measure_locally(model, snapshot, events)
            return table, members, tie_counts(snapshot, known)
        table, members, ties = self._measure(model, snapshot, events, known)
        assert ties is not None
        return table, members, ties

    def score(self, inputs: ScoreInputs, policy: ShiftPolicy) -> WindowScores:
        """The window's shift scores computed on the cluster over parts of its accounts
        (:mod:`rolewatch.scale.scoring`); a calibration other than ``"evidence"`` scores in
        this process."""
        accounts = int(inputs.mixture.shape[0])
        if policy.calibration != "evidence" or accounts == 0:
            return inputs.score(policy)
        from rolewatch.scale.scoring import score_on_cluster

        partitions = self.partitions_for(accounts)
        return self._attempted(
            lambda: score_on_cluster(self.client, inputs, policy, partitions), None
        )

    def retried(self, work: Callable[[], _Result]) -> _Result:
        """``work()`` on the cluster, started again when the cluster loses its data (as the
        measure is), up to ``attempts`` times in all."""
        return self._attempted(work, None)

    def _measure(
        self,
        model: FrozenModel,
        snapshot: Snapshot,
        events: ClosingEvents,
        known: PairHistory | None,
    ) -> tuple[FeatureTable, Memberships, TieCounts | None]:
        return self._attempted(lambda: self._measure_once(model, snapshot, events, known), known)

    def _attempted(self, work: Callable[[], _Result], known: PairHistory | None) -> _Result:
        """``work()``, started again when the cluster loses its data, up to ``attempts``
        times in all."""
        for attempt in range(1, self.attempts + 1):
            try:
                return work()
            except BaseException as error:  # as broad as the lost-data classes
                if not lost_data(error):
                    raise
                log.warning(
                    "the Dask cluster lost the window's data; computing it again",
                    extra={"fields": {"attempt": attempt, "error": repr(error)[:300]}},
                )
                _forget_history_read(known)
                if attempt < self.attempts:
                    time.sleep(RETRY_PAUSE_S * attempt)
        raise DaskDataLost(
            f"the Dask cluster lost the window's data in {self.attempts} attempts (workers "
            "dying or restarted over their memory limit); nothing was written, and the next "
            "tick closes the window again"
        )

    def window_graph(self, snapshot: Snapshot, events: ClosingEvents) -> tuple[Any, list[Any]]:
        """The window's graph on the cluster (:class:`rolewatch.scale.graph.WindowGraph`,
        its tasks submitted), and the futures of the event chunks this process sent for it
        (none when the workers read the events): let them go once the blocks are built."""
        from rolewatch.scale.graph import build_graph, scatter_events

        if isinstance(events, WorkerEvents):  # read by the workers: chunks they can recompute
            return events.take_graph() or build_graph((events.chunks, snapshot.n_nodes)), []
        assert isinstance(events, WindowEvents)  # held here: sent from this process
        actor, target = events.rows_in(snapshot)
        scattered, n = scatter_events(
            self.client,
            actor,
            target,
            events.weight,
            snapshot.n_nodes,
            self.partitions_for(snapshot.n_nodes),
        )
        return build_graph((scattered, n)), list(scattered.futures)

    def wait_built(self, built: list[Any], chunks: list[Any]) -> None:
        """Wait for a window's blocks, built from the event ``chunks`` this process sent.

        A chunk lost with its worker before its blocks were built can leave them waiting
        for ever (nothing can compute it again): every :data:`BUILD_POLL_S` seconds the
        wait asks the scheduler whether each chunk still has a holder, and when one has
        none it raises ``CancelledError``, which starts the computation again
        (:meth:`retried`)."""
        from concurrent.futures import CancelledError

        from distributed import wait

        while True:
            try:
                with self.client.as_current():  # a client made for one scheduler is no default
                    wait(built, timeout=BUILD_POLL_S)
                return
            except TimeoutError:
                if self._chunk_lost(chunks):
                    raise CancelledError(
                        "a worker holding the window's events left before its blocks were built"
                    ) from None

    def _chunk_lost(self, chunks: list[Any]) -> bool:
        """Whether any of ``chunks`` is lost (as this client has heard) or has no holder
        among the workers alive (as the scheduler knows)."""
        if not chunks:
            return False
        if any(future.status != "finished" for future in chunks):
            return True
        holders, alive = self.client.who_has(chunks), live_workers(self.client)
        return any(not alive.intersection(holders.get(future.key, ())) for future in chunks)

    def _measure_once(
        self,
        model: FrozenModel,
        snapshot: Snapshot,
        events: ClosingEvents,
        known: PairHistory | None,
    ) -> tuple[FeatureTable, Memberships, TieCounts | None]:

        from rolewatch.scale.features import measure_window
        from rolewatch.scale.ties import count_ties

        graph, held = self.window_graph(snapshot, events)
        try:
            built = [*graph.blocks.futures, *graph.base.futures]
            chunks, held = held, held + built
            self.wait_built(built, chunks)
            # The blocks hold the events now: free the workers' copies of the chunks (a
            # worker lost from here on fails the attempt either way: chunks scattered from
            # this process cannot be recomputed).
            del chunks
            held = built
            # counted beside the features: the cluster works on both at once
            pending = None if known is None else count_ties(graph, snapshot.node_keys, known)
            held += [] if pending is None else pending.futures
            measured = measure_window(
                graph, model.recipe, model.basis, raw_here_max_bytes=self.raw_here_max_bytes
            )
            ties = None if pending is None else pending.result()
        except BaseException:
            # Free the window's data on the workers now: the error's traceback would keep
            # their futures alive until collected. Not after success: the raw values left
            # on the workers are released with the table that reads them.
            self.client.cancel(held)
            raise
        table = FeatureTable(
            nodes=snapshot.nodes,
            names=model.recipe.names,
            raw=measured.raw,
            binned=measured.binned,
            recipe_version=model.recipe.version,
            triangles=measured.triangles,
        )
        return table, measured.members, ties


def _forget_history_read(known: PairHistory | None) -> None:
    """Let the next attempt place the history on the cluster again: the ranges placed by
    this one (or kept from an earlier close) may be gone with a worker, or forgotten by a
    scheduler that lost this client."""
    from rolewatch.scale.ties import PairsOnCluster

    if isinstance(known, PairsOnCluster):
        known.forget_ranges()


def measure_for(settings: Settings) -> Measure:
    """How the close computes features and memberships, from the ``compute`` setting."""
    if settings.compute == "local":
        return measure_locally
    return DaskMeasure(
        dask_client(settings.dask_scheduler),
        settings.dask_partitions,
        ACCOUNTS_PER_PARTITION,
        attempts=DASK_ATTEMPTS,
        raw_here_max_bytes=RAW_HERE_MAX_BYTES,
    )


def fit_for(
    settings: Settings,
    measure: Measure,
    snapshots: list[Snapshot],
    events: Sequence[ClosingEvents],
) -> FrozenModel:
    """The model fitted on the training windows (their snapshots and events), their
    features computed where the close computes: in this process, or on the cluster of a
    :class:`DaskMeasure` (:class:`rolewatch.scale.training.ClusterTraining`: only the
    training sample's rows come back), started again when the cluster loses its data."""
    windows = list(zip(snapshots, events, strict=True))
    if not isinstance(measure, DaskMeasure):
        return fit_model(settings, snapshots)
    from rolewatch.scale.training import ClusterTraining

    def attempt() -> FrozenModel:
        training = ClusterTraining(measure, windows)
        try:
            return fit_model(settings, snapshots, features=training)
        except BaseException:
            training.cancel()
            raise

    return measure.retried(attempt)


def known_pairs_for(
    connection: Connection, settings: Settings, measure: Measure, *, before_end_us: int
) -> PairHistory:
    """The known-pair history a close before ``before_end_us`` counts its ties against.

    A Dask close with ``output_archive`` set leaves it in the outputs, every earlier window's
    first-seen pairs in its own file, and the workers read it one key range each
    (:class:`rolewatch.scale.ties.ArchivedPairs`): the closing process never holds it. An
    earlier window without its file there (closed before the outputs kept pairs, or before
    ``output_archive`` was set) has it written first from the store, one window at a time.
    A Dask close without outputs sends the history from the store to the workers: one
    window's part at a time at the first close of the process, later only the windows closed
    since, merged into the ranges kept on the cluster
    (:class:`rolewatch.scale.stored_pairs.StoredPairs`). A local close reads the whole
    history from the store.
    """
    outputs = settings.output_archive
    if not isinstance(measure, DaskMeasure):
        return KnownPairs.from_parts(known_pair_parts(connection, before_end_us=before_end_us))
    if not outputs:
        from rolewatch.scale.stored_pairs import StoredPairs

        return StoredPairs.read(connection, measure.client, before_end_us=before_end_us)
    from rolewatch.scale.pair_outputs import pair_windows, write_window_pairs
    from rolewatch.scale.ties import ArchivedPairs

    ends = known_pair_windows(connection, before_end_us=before_end_us)
    missing = sorted(set(ends) - pair_windows(outputs, ends))
    for end in missing:
        write_window_pairs(outputs, end, window_pair_keys(connection, end_us=end))
    if missing:
        log.info(
            "wrote the known pairs of earlier windows to the outputs",
            extra={"fields": {"windows": len(missing)}},
        )
    return ArchivedPairs(measure.client, outputs, ends)


def keeps_memberships(settings: Settings, accounts: int) -> bool:
    """Whether a window of ``accounts`` accounts keeps its memberships in the SQL store
    (otherwise only ``output_archive`` holds them)."""
    limit = settings.store_memberships_max_accounts
    return not limit or accounts <= limit


def record_outputs(
    settings: Settings, end_us: int, model: FrozenModel, result: WindowResult
) -> None:
    """Write a measured window's memberships and scores, and its first-seen pairs, to
    ``output_archive`` (if set)."""
    if not settings.output_archive:
        return
    from rolewatch.scale.outputs import WindowOutputs, write_window_outputs
    from rolewatch.scale.pair_outputs import write_window_pairs

    if result.new_pairs is not None:
        write_window_pairs(settings.output_archive, end_us, result.new_pairs)
    columns = membership_columns(model, result)
    write_window_outputs(
        settings.output_archive,
        end_us,
        WindowOutputs(
            **{item.name: getattr(columns, item.name) for item in fields(columns)},
            basis_version=model.basis.version,
        ),
    )
