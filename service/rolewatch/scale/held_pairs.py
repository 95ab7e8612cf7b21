"""The archived known-pair history kept on the Dask cluster from one close to the next.

A Dask close with ``output_archive`` set reads the known-pair history on the workers, one
key range each, from every earlier window's pair file (:mod:`rolewatch.scale.pair_outputs`).
A running service closes one window after another against a history that only grows: each
close adds the pairs of the window closed before it. So the ranges a close read stay on the
cluster, and the next close that asks for the same history plus newer windows reads only
those windows' files into each range (merged where the range lives, the older part never
read again): a close opens one pair file per range instead of every window's.

One history is kept per process (one closer runs at a time), for one client and one outputs
path; it is read whole again when the client or the path change, when a close asks for
more than twice or less than half its ranges, when a window it holds is no longer asked for,
and after the cluster lost data
(:func:`forget_held_pairs`). Its cost is the workers' memory between closes: 8 bytes a
known pair, spread over the workers as the ranges are.
"""

from __future__ import annotations

import threading
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np

from rolewatch.scale.pair_outputs import pair_range, with_window_pairs
from rolewatch.scale.ties import KnownRanges

__all__ = ["forget_held_pairs", "held_ranges"]


@dataclass(frozen=True)
class _Held:
    client: Any
    outputs: str
    window_ends: frozenset[int]
    ranges: KnownRanges


_LOCK = threading.Lock()
_held: _Held | None = None


def held_ranges(client: Any, outputs: str, window_ends: Iterable[int], count: int) -> KnownRanges:
    """The first-seen pairs of the windows ``window_ends`` on the cluster, in ``count`` key
    ranges splitting the 64-bit key space evenly: the ranges kept from the last call
    extended with the windows they lack when they hold none that is not asked for (in the
    kept count of ranges when it is within a factor of two of ``count``), else read whole.
    The result is kept for the next call."""
    global _held
    ends = frozenset(int(end) for end in window_ends)
    with _LOCK:
        held = _held
        if (
            held is not None
            and held.client is client
            and held.outputs == outputs
            and _close_enough(held.ranges.ranges, count)
            and held.window_ends <= ends
        ):
            added = sorted(ends - held.window_ends)
            ranges = _extended(client, outputs, held.ranges, added) if added else held.ranges
        else:
            _held = None  # let the old ranges go before the new are read
            ranges = _read(client, outputs, sorted(ends), count)
        _held = _Held(client, outputs, ends, ranges)
        return ranges


def _close_enough(kept: int, asked: int) -> bool:
    """Whether ``kept`` ranges serve a close that asks for ``asked`` (its partitions):
    the count follows the window's accounts, so it moves a little from one close to the
    next; within a factor of two the kept ranges are used as they are (any count serves the
    tie counts), beyond it they are read again in the new count, so that a much larger
    window does not leave a worker holding one range of a big history."""
    return asked <= 2 * kept and kept <= 2 * asked


def forget_held_pairs() -> None:
    """Drop the kept ranges (the next close reads the history whole)."""
    global _held
    with _LOCK:
        _held = None


def _bounds(count: int) -> list[int]:
    step = 2**64 // count
    return [k * step for k in range(1, count)]


def _read(client: Any, outputs: str, window_ends: list[int], count: int) -> KnownRanges:
    bounds = _bounds(count)
    lows, highs = [0, *bounds], [*bounds, None]
    chunks = tuple(
        client.submit(pair_range, outputs, window_ends, low, high, pure=False)
        for low, high in zip(lows, highs, strict=True)
    )
    return KnownRanges(chunks, np.array(bounds, dtype=np.uint64))


def _extended(client: Any, outputs: str, ranges: KnownRanges, added: list[int]) -> KnownRanges:
    bounds = [int(start) for start in ranges.starts]
    lows, highs = [0, *bounds], [*bounds, None]
    chunks = tuple(
        client.submit(with_window_pairs, chunk, outputs, added, low, high, pure=False)
        for chunk, low, high in zip(ranges.chunks, lows, highs, strict=True)
    )
    return KnownRanges(chunks, ranges.starts)
