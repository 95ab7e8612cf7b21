"""The store's known-pair history on the Dask cluster, kept there from one close to the next.

A Dask close without ``output_archive`` counts its tie cells against the history the SQL
store keeps (:mod:`rolewatch.store.pairs`). The first close of a process reads it whole and
sends it to the workers in key ranges; the ranges stay there
(:mod:`rolewatch.scale.held_pairs`), and a later close reads from the store only the parts of
the windows closed since, sends each range its share of them and merges it in where the
range lives. So a running service's closing process holds the whole history once, at its
first close, instead of at every close (8 bytes a pair, and its sort: several times that at
its peak).

The kept history is named by each window's end, record and pair count: a part that was
written again, or a store rebuilt under the same address, does not match it and is read
whole. A close that finds its ranges lost on the cluster reads the history whole again from
the store, with a connection of its own.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sqlalchemy.engine import Connection, Engine

from rolewatch.engine.pairs import KnownPairs
from rolewatch.engine.sorting import merged_sorted, unique_sorted
from rolewatch.scale.held_pairs import even_bounds, held_windows, keep, kept_for
from rolewatch.scale.ties import KnownRanges, PairsOnCluster
from rolewatch.store.pairs import PairWindow, known_pair_parts, pair_window_parts, window_pair_keys

__all__ = ["StoredPairs"]


class StoredPairs(PairsOnCluster):
    """The store's known pairs of the windows before ``before_end_us`` (``windows``), to be
    placed on the cluster: ``whole`` when nothing kept serves them, else ``added``, the
    pairs of the windows the kept ranges lack (read by :meth:`read`)."""

    def __init__(
        self,
        client: Any,
        engine: Engine,
        *,
        before_end_us: int,
        windows: list[PairWindow],
        whole: KnownPairs | None,
        added: np.ndarray | None,
    ) -> None:
        super().__init__(client)
        self.engine = engine
        self.before_end_us = before_end_us
        self.windows = list(windows)
        self._whole = whole
        self._added = added

    @classmethod
    def read(cls, connection: Connection, client: Any, *, before_end_us: int) -> StoredPairs:
        """What the close before ``before_end_us`` must send: the parts of the windows the
        ranges kept on the cluster lack, or the whole history."""
        windows = pair_window_parts(connection, before_end_us=before_end_us)
        kept = held_windows(client, _source(connection.engine))
        if kept is not None and kept <= set(windows):
            parts = [
                window_pair_keys(connection, end_us=window.end_us)
                for window in windows
                if window not in kept
            ]
            added = unique_sorted(np.concatenate(parts)) if parts else _no_keys()
            return cls(
                client,
                connection.engine,
                before_end_us=before_end_us,
                windows=windows,
                whole=None,
                added=added,
            )
        whole = KnownPairs.from_parts(known_pair_parts(connection, before_end_us=before_end_us))
        return cls(
            client,
            connection.engine,
            before_end_us=before_end_us,
            windows=windows,
            whole=whole,
            added=None,
        )

    def _is_empty(self) -> bool:
        return not self.windows

    def _place(self, client: Any, count: int) -> KnownRanges:
        source = _source(self.engine)
        found = kept_for(client, source, self.windows, count)
        if found is not None and self._added is not None:
            ranges = _merged_in(client, found[0], self._added)
        else:
            whole = self._whole if self._whole is not None else self._read_whole()
            ranges = _sent(client, whole.keys, count)
        self._whole = self._added = None  # on the cluster now
        keep(client, source, self.windows, ranges)
        return ranges

    def _read_whole(self) -> KnownPairs:
        with self.engine.connect() as connection:
            parts = known_pair_parts(connection, before_end_us=self.before_end_us)
        return KnownPairs.from_parts(parts)


def _source(engine: Engine) -> tuple[str, str]:
    return ("store", engine.url.render_as_string(hide_password=True))


def _no_keys() -> np.ndarray:
    return np.zeros(0, dtype=np.uint64)


def _sent(client: Any, keys: np.ndarray, count: int) -> KnownRanges:
    """The sorted ``keys`` sent to the workers in ``count`` ranges of the key space."""
    bounds = np.array(even_bounds(count), dtype=np.uint64)
    cuts = [0, *np.searchsorted(keys, bounds).tolist(), keys.size]
    parts = [keys[lo:hi] for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)]
    return KnownRanges(tuple(client.scatter(parts, hash=False)), bounds)


def _merged_in(client: Any, ranges: KnownRanges, added: np.ndarray) -> KnownRanges:
    """``ranges`` with the sorted keys ``added`` merged in, each range's share sent to it."""
    if added.size == 0:
        return ranges
    cuts = [0, *np.searchsorted(added, ranges.starts).tolist(), added.size]
    chunks = []
    for chunk, lo, hi in zip(ranges.chunks, cuts[:-1], cuts[1:], strict=True):
        if lo == hi:
            chunks.append(chunk)
            continue
        (share,) = client.scatter([added[lo:hi]], hash=False)
        chunks.append(client.submit(merged_sorted, chunk, share, pure=False))
    return KnownRanges(tuple(chunks), ranges.starts)
