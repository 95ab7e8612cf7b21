"""Count-min sketches with seeded hashing, queried for a whole batch of keys at once.

A count-min sketch (Cormode & Muthukrishnan, "An improved data stream summary: the
count-min sketch and its applications", J. Algorithms 2005) keeps ``rows`` arrays of
``width`` counters; a key adds to one counter per row, chosen by that row's hash, and its
count is estimated as the minimum of its counters. The estimate never falls below the true
count and equals it when, in at least one row, no other key shares the key's counter.

Keys are 64-bit integers. Account ids become keys through BLAKE2b (one call per distinct
id); a pair of keys is mixed into one with the SplitMix64 finaliser (Steele, Lea & Flood,
OOPSLA 2014, constants as recalled). Each row hashes a key with the multiply-add-shift
scheme ``((a * x + b) mod 2**64) >> 32`` (Dietzfelbinger, STACS 1996, as recalled), with
``a`` (odd) and ``b`` drawn from a seeded generator, then reduces it modulo ``width``.
The same seed gives the same counters on every machine.
"""

from __future__ import annotations

import hashlib

import numpy as np

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def account_keys(accounts) -> np.ndarray:
    """64-bit key of each account id (BLAKE2b of its UTF-8 text; independent of seeds)."""
    ids = np.asarray(accounts).astype(str).reshape(-1)
    unique, inverse = np.unique(ids, return_inverse=True)
    keys = np.fromiter(
        (
            int.from_bytes(hashlib.blake2b(s.encode(), digest_size=8).digest(), "little")
            for s in unique
        ),
        dtype=np.uint64,
        count=len(unique),
    )
    return keys[inverse]


def mix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finaliser: a bijection of uint64 that spreads every input bit."""
    z = np.asarray(x, dtype=np.uint64)
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def pair_keys(first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """One 64-bit key per ordered pair (first, second)."""
    a = np.asarray(first, dtype=np.uint64)
    b = np.asarray(second, dtype=np.uint64)
    return mix64(mix64(a) * _GOLDEN + b)


class CountMinPair:
    """*Current* and *total* count-min sketches for one or more kinds of key.

    This is the state MIDAS keeps: for each kind of key (edges, sources, destinations) the
    count of the current time tick and the count over all ticks so far, two sketches that
    share their hash functions. Each kind has its own ``rows`` hash functions; the kinds'
    counters live side by side in one array so that a tick is inserted in one call.
    """

    def __init__(self, rows: int, width: int, rng: np.random.Generator, *, kinds: int = 1):
        if rows < 1 or width < 1 or kinds < 1:
            raise ValueError(
                f"a sketch needs rows, width and kinds >= 1, got {rows}, {width}, {kinds}"
            )
        self.rows = rows
        self.width = width
        self.kinds = kinds
        self._mul = rng.integers(0, 2**64, size=(kinds, rows), dtype=np.uint64) | np.uint64(1)
        self._add = rng.integers(0, 2**64, size=(kinds, rows), dtype=np.uint64)
        self.current = np.zeros(kinds * rows * width)
        self.total = np.zeros(kinds * rows * width)

    def cells(self, keys: np.ndarray, kind: int = 0) -> np.ndarray:
        """Flat counter index of every key in each of the kind's rows: (rows, len(keys))."""
        x = np.asarray(keys, dtype=np.uint64)[None, :]
        h = (self._mul[kind][:, None] * x + self._add[kind][:, None]) >> np.uint64(32)
        first = kind * self.rows
        offset = (np.arange(first, first + self.rows, dtype=np.int64) * self.width)[:, None]
        return (h % np.uint64(self.width)).astype(np.int64) + offset

    def decay(self, factor: float) -> None:
        """Multiply the current counts by ``factor`` (0 resets them)."""
        self.current *= factor

    def insert_batch(self, cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Insert a batch of keys one after another; estimates just after each insertion.

        ``cells`` is the kinds' :meth:`cells` stacked, shape (kinds * rows, m): column ``j``
        is the ``j``-th arrival, with one key of every kind. Returns ``(current, total)``,
        each of shape (kinds, m). The ``j``-th arrival sees the counters as they were
        before the batch plus one for every arrival ``i <= j`` that hit the same counter,
        which is what inserting and querying the arrivals one at a time would give.
        """
        flat = cells.reshape(-1)
        seen, hit, count = _running_count(flat)
        seen = seen.reshape(cells.shape)
        shape = (-1, self.rows, cells.shape[1])
        current = (self.current[cells] + seen).reshape(shape).min(axis=1)
        total = (self.total[cells] + seen).reshape(shape).min(axis=1)
        self.current[hit] += count
        self.total[hit] += count
        return current, total


def _running_count(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For each position, how many positions up to and including it hold the same value;
    also the distinct values and how often each occurs.

    Positions are taken row-major, but values of different rows never coincide (each row
    has its own counter range), so the count runs along each row in arrival order.
    """
    order = np.argsort(values, kind="stable")
    ordered = values[order]
    new_group = np.empty(len(values), dtype=bool)
    new_group[:1] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new_group[1:])
    group_start = np.flatnonzero(new_group)
    group = np.cumsum(new_group) - 1
    seen = np.empty(len(values), dtype=np.float64)
    seen[order] = np.arange(len(values)) - group_start[group] + 1
    count = np.diff(np.append(group_start, len(values)))
    return seen, ordered[group_start], count
