"""The known-pair history kept on the Dask cluster from one close to the next.

A Dask close counts its tie cells against the known-pair history cut into key ranges on the
workers (:mod:`rolewatch.scale.ties`). A running service closes one window after another
against a history that only grows: each close adds the pairs of the window closed before
it. So the ranges a close placed stay on the cluster, and the next close that asks for the
same history plus newer windows merges only those windows' pairs into each range, where the
range lives (the older part is never read or sent again):

* with ``output_archive`` set, the ranges are read on the workers from every window's pair
  file the first time, and later each range reads only the new windows' files
  (:func:`archived_ranges`);
* without it, the closing process reads the history from the store one window's part at a
  time the first time, sending each part out cut by range, and later only the new windows'
  parts (:class:`rolewatch.scale.stored_pairs.StoredPairs`).

One history is kept per process (one closer runs at a time), for one client and one source
(the outputs path, or the store), named by its windows (for the store: each window's end,
record and pair count, so a store rewritten under the same address is not mistaken for the
one kept). It is placed whole again when the client or the source change, when a close asks
for more than twice or less than half its ranges, when a window it holds is no longer asked
for, and after the cluster lost data (:func:`forget_held_pairs`). Its cost is the workers'
memory between closes: 8 bytes a known pair, spread over the workers as the ranges are.
"""

from __future__ import annotations

import threading
from collections.abc import Hashable, Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from rolewatch.scale.ties import KnownRanges

__all__ = [
    "archived_ranges",
    "even_bounds",
    "forget_held_pairs",
    "keep",
    "kept_for",
]


@dataclass(frozen=True)
class _Held:
    client: Any
    source: Hashable
    windows: frozenset[Hashable]
    ranges: KnownRanges


_LOCK = threading.Lock()
_held: _Held | None = None


def kept_for(
    client: Any, source: Hashable, windows: Iterable[Hashable], count: int
) -> tuple[KnownRanges, list[Hashable]] | None:
    """The kept ranges that serve a history of ``windows`` in about ``count`` ranges, and
    the windows they lack (oldest first when sortable); None when none serve it (the
    history must be placed whole)."""
    asked = list(windows)
    with _LOCK:
        held = _held
    if (
        held is None
        or held.client is not client
        or held.source != source
        or not _close_enough(held.ranges.ranges, count)
        or not held.windows <= set(asked)
    ):
        return None
    return held.ranges, [window for window in asked if window not in held.windows]


def keep(client: Any, source: Hashable, windows: Iterable[Hashable], ranges: KnownRanges) -> None:
    """Keep ``ranges`` (the history of ``windows`` from ``source``) for the next close."""
    global _held
    with _LOCK:
        _held = _Held(client, source, frozenset(windows), ranges)


def forget_held_pairs() -> None:
    """Drop the kept ranges (the next close places the history whole)."""
    global _held
    with _LOCK:
        _held = None


def _close_enough(kept: int, asked: int) -> bool:
    """Whether ``kept`` ranges serve a close that asks for ``asked`` (its partitions):
    the count follows the window's accounts, so it moves a little from one close to the
    next; within a factor of two the kept ranges are used as they are (any count serves the
    tie counts), beyond it the history is placed again in the new count, so that a much
    larger window does not leave a worker holding one range of a big history."""
    return asked <= 2 * kept and kept <= 2 * asked


def even_bounds(count: int) -> list[int]:
    """The ``count - 1`` keys that cut the 64-bit key space into ``count`` equal ranges
    (pair keys are hashes, so each range holds about the same share of a history)."""
    step = 2**64 // count
    return [k * step for k in range(1, count)]


def archived_ranges(
    client: Any, outputs: str, window_ends: Iterable[int], count: int
) -> KnownRanges:
    """The first-seen pairs of the windows ``window_ends`` in the outputs at ``outputs``, on
    the cluster: the kept ranges with the windows they lack merged in from those windows'
    files, or every window's file read into ``count`` ranges. Kept for the next call."""
    ends = sorted({int(end) for end in window_ends})
    found = kept_for(client, outputs, ends, count)
    if found is None:
        forget_held_pairs()  # let the old ranges go before the new are read
        ranges = _read(client, outputs, ends, count)
    else:
        kept, lacking = found
        ranges = _extended(client, outputs, kept, sorted(_ends_of(lacking)))
    keep(client, outputs, ends, ranges)
    return ranges


def _ends_of(windows: list[Hashable]) -> list[int]:
    """The window ends among ``windows`` (an archived history names its windows by end)."""
    return [end for end in windows if isinstance(end, int)]


def _lows_and_highs(starts: Iterable[int]) -> tuple[list[int], list[int | None]]:
    bounds = [int(start) for start in starts]
    return [0, *bounds], [*bounds, None]


def _read(client: Any, outputs: str, window_ends: list[int], count: int) -> KnownRanges:
    from rolewatch.scale.pair_outputs import pair_range

    bounds = even_bounds(count)
    lows, highs = _lows_and_highs(bounds)
    chunks = tuple(
        client.submit(pair_range, outputs, window_ends, low, high, pure=False)
        for low, high in zip(lows, highs, strict=True)
    )
    return KnownRanges(chunks, np.array(bounds, dtype=np.uint64))


def _extended(client: Any, outputs: str, ranges: KnownRanges, added: list[int]) -> KnownRanges:
    from rolewatch.scale.pair_outputs import with_window_pairs

    if not added:
        return ranges
    lows, highs = _lows_and_highs(ranges.starts)
    chunks = tuple(
        client.submit(with_window_pairs, chunk, outputs, added, low, high, pure=False)
        for chunk, low, high in zip(ranges.chunks, lows, highs, strict=True)
    )
    return KnownRanges(chunks, ranges.starts)
