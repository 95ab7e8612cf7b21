"""The store's known-pair history on the Dask cluster, kept there from one close to the next.

A Dask close without ``output_archive`` counts its tie cells against the history the SQL
store keeps (:mod:`rolewatch.store.pairs`). The first close of a process reads it from the
store one window's part at a time and sends each part to the workers cut by key range (a
range is then made of its pieces where it lives), so the closing process never holds the
whole history; the ranges stay on the cluster (:mod:`rolewatch.scale.held_pairs`), and a
later close reads only the parts of the windows closed since, sends each range its share
of them and merges it in there.

The kept history is named by each window's end, record and pair count: a part that was
written again, or a store rebuilt under the same address, does not match it and the whole
history is sent again. A close that finds its ranges lost on the cluster sends the whole
history again.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sqlalchemy.engine import Connection, Engine

from rolewatch.engine.sorting import merged_sorted, unique_sorted
from rolewatch.scale.held_pairs import even_bounds, forget_held_pairs, keep, kept_for
from rolewatch.scale.ties import KnownRanges, PairsOnCluster
from rolewatch.store.pairs import PairWindow, pair_window_parts, window_pair_keys

__all__ = ["StoredPairs"]


class StoredPairs(PairsOnCluster):
    """The store's known pairs of the windows ``windows`` (the parts of the history before a
    close), placed on the cluster when the close first asks for them, with a connection of
    their own: the parts the kept ranges lack merged into them, or every part sent."""

    def __init__(self, client: Any, engine: Engine, windows: list[PairWindow]) -> None:
        super().__init__(client)
        self.engine = engine
        self.windows = list(windows)

    @classmethod
    def read(cls, connection: Connection, client: Any, *, before_end_us: int) -> StoredPairs:
        """The history a close before ``before_end_us`` counts against, its parts named
        (their keys are read when the close places them)."""
        windows = pair_window_parts(connection, before_end_us=before_end_us)
        return cls(client, connection.engine, windows)

    def _is_empty(self) -> bool:
        return not self.windows

    def _place(self, client: Any, count: int) -> KnownRanges:
        source = _source(self.engine)
        found = kept_for(client, source, self.windows, count)
        if found is None:
            forget_held_pairs()  # let the old ranges go before the new are sent
            ranges = self._sent_whole(client, count)
        else:
            kept, lacking = found
            ranges = _merged_in(client, kept, self._keys_of(lacking))
        keep(client, source, self.windows, ranges)
        return ranges

    def _keys_of(self, windows: list[Any]) -> np.ndarray:
        """The keys of the parts ``windows``, sorted (a few windows' parts: small)."""
        if not windows:
            return _no_keys()
        with self.engine.connect() as connection:
            parts = [window_pair_keys(connection, end_us=window.end_us) for window in windows]
        return unique_sorted(np.concatenate(parts))

    def _sent_whole(self, client: Any, count: int) -> KnownRanges:
        """Every part sent to the workers, one window's part at a time cut by the ranges'
        bounds (this process never holds the whole history), each range then made of its
        pieces where it lives."""
        bounds = np.array(even_bounds(count), dtype=np.uint64)
        pieces: list[list[Any]] = [[] for _ in range(count)]
        with self.engine.connect() as connection:
            for window in self.windows:
                part = window_pair_keys(connection, end_us=window.end_us)  # sorted, distinct
                cuts = [0, *np.searchsorted(part, bounds).tolist(), part.size]
                sent = client.scatter(
                    [part[lo:hi] for lo, hi in zip(cuts[:-1], cuts[1:], strict=True)], hash=False
                )
                for k, future in enumerate(sent):
                    pieces[k].append(future)
        chunks = tuple(client.submit(_joined, *pieces[k], pure=False) for k in range(count))
        return KnownRanges(chunks, bounds)


def _joined(*pieces: np.ndarray) -> np.ndarray:
    """One range of the history from its pieces (each window's part of it), sorted and
    distinct: the pieces joined and sorted in place, without a second copy of the range
    (windows' parts are disjoint; a key in two is kept once all the same)."""
    if not pieces:
        return _no_keys()
    joined = np.concatenate(pieces)
    joined.sort()
    repeated = joined[1:] == joined[:-1]
    return joined[np.r_[True, ~repeated]] if repeated.any() else joined


def _source(engine: Engine) -> tuple[str, str]:
    return ("store", engine.url.render_as_string(hide_password=True))


def _no_keys() -> np.ndarray:
    return np.zeros(0, dtype=np.uint64)


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
