"""The features of the last measured window, kept in memory for the next window's alerts.

An alert shows the account's features and readable measures in its baseline window
(:mod:`rolewatch.pipeline.evidence`), usually the window just before. Without this, every
close that raises alerts reads that window's events again and recomputes its features (on
``close-1m``, about a third of the evidence stage). A window's features never change once it
is closed, so the closer keeps the last window's feature table and snapshot and the next
close takes them from here; any other baseline window is recomputed from its stored events
as before.

A kept window is used only when it matches the stored one it stands for: same start and
end, same feature recipe, and the same number of accounts and of events as that window's
stored memberships. A window is kept only when what this process holds of it fits
:data:`MAX_KEPT_BYTES`: its snapshot, and its raw values and bins unless a cluster close
left them with its workers (``compute = "dask"``, a large window: they stay in the workers'
scratch files, read by rows, and this process holds only their file names), so a very
large window does not hold its memory until the next close. Values left on workers that
have since left the cluster are not used: the evidence recomputes that window instead.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

from rolewatch.engine.features import FeatureTable
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.loading import PastWindowFacts
from rolewatch.store.alerts import WindowRef

__all__ = ["MAX_KEPT_BYTES", "RecentFeatures"]

MAX_KEPT_BYTES = 512 * 2**20


@dataclass(frozen=True)
class _Kept:
    start: str
    end: str
    recipe_version: str
    events: int
    snapshot: Snapshot
    table: FeatureTable


class RecentFeatures:
    """The feature table and snapshot of the most recently measured window of one store."""

    def __init__(self, max_bytes: int = MAX_KEPT_BYTES) -> None:
        self._max_bytes = max_bytes
        self._kept: _Kept | None = None
        self._lock = threading.Lock()

    def remember(self, window: WindowRef, snapshot: Snapshot, table: FeatureTable) -> None:
        """Keep this window's features (replacing the previous window's), unless what this
        process would hold of them is larger than the limit."""
        held = snapshot.counts.data.nbytes * 3 + _held_here(table.raw) + _held_here(table.binned)
        events = int(round(float(snapshot.counts.sum())))
        kept = (
            _Kept(window.start, window.end, table.recipe_version, events, snapshot, table)
            if held <= self._max_bytes
            else None
        )
        with self._lock:
            self._kept = kept

    def forget(self) -> None:
        """Drop the kept window (its values could not be read)."""
        with self._lock:
            self._kept = None

    def find(
        self, past: PastWindowFacts, recipe_version: str
    ) -> tuple[Snapshot, FeatureTable] | None:
        """The kept snapshot and features of ``past``, or None when they are not here."""
        with self._lock:
            kept = self._kept
        ref = past.ref
        if kept is None or ref is None:
            return None
        same_window = (kept.start, kept.end, kept.recipe_version) == (
            ref.start,
            ref.end,
            recipe_version,
        )
        if not same_window or kept.snapshot.n_nodes != past.accounts or kept.events != past.events:
            return None
        if not _readable(kept.table.raw):
            self.forget()
            return None
        return kept.snapshot, kept.table


def _held_here(values: object) -> int:
    """Bytes ``values`` take in this process: none for values left on a cluster's workers
    (:class:`rolewatch.scale.features.WorkerFeatureRows`, whose ``nbytes`` are on disk)."""
    return values.nbytes if isinstance(values, np.ndarray) else 0


def _readable(values: object) -> bool:
    """False for values left on workers of which one has left the cluster since."""
    readable = getattr(values, "readable", None)
    return True if readable is None else bool(readable())
