"""Who has dealt with whom before: 64-bit keys of account pairs and the known-pair history.

Whether a counterpart is *new* to an account depends on the account's whole known history,
not only on the window before. Keeping every earlier window's events to answer that would
be costly, so each account pair is reduced to one 64-bit key and the history to one sorted
array of the keys of every pair that ever interacted (8 bytes a pair). A window adds the
keys of its pairs that were not known yet; a membership test is a binary search.

Keys:

* an account's key is the 64-bit FNV-1a hash of its id's UTF-8 bytes (Fowler, Noll & Vo;
  IETF draft "The FNV Non-Cryptographic Hash Algorithm", draft-eastlake-fnv, as recalled),
  computed for all ids at once, one byte position at a time;
* a pair's key mixes both account keys with the splitmix64 finaliser (Steele, Lea &
  Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014, as recalled),
  orders them (so direction does not matter), combines them by a multiply-add (not a
  XOR: FNV keys of similar ids differ in structured ways that a linear combination keeps)
  and mixes the result again, so pairs that share an account get unrelated keys.

With ``m`` known pairs, a false "known" needs two 64-bit keys to collide: about
``m**2 / 2**65`` expected collisions in the whole history (under 0.01 for 10**8 pairs).

Pure: arrays in, arrays out; vectorised (no loop over accounts or pairs).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from rolewatch.engine.sorting import unique_sorted

__all__ = ["FNV_OFFSET", "FNV_PRIME", "KnownPairs", "PairHistory", "account_keys", "pair_keys"]

FNV_OFFSET = np.uint64(0xCBF29CE484222325)
FNV_PRIME = np.uint64(0x100000001B3)
_MIX_1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX_2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)  # 2**64 / golden ratio, splitmix64's increment


def account_keys(ids) -> np.ndarray:
    """64-bit FNV-1a hash of each account id's UTF-8 bytes.

    The ids' bytes are laid end to end (an Arrow string array), and the hash advances one
    byte position at a time over the ids still that long: the work is the ids' total
    length, and memory a few bytes an id beyond their text, whatever the longest id (a
    table as wide as the longest id cost 8 bytes an id per character of it: 1.5 GB for
    one 200-character id among a million).

    Parameters
    ----------
    ids : sequence of str

    Returns
    -------
    ndarray of uint64, one key per id.
    """
    import pyarrow as pa

    values = np.asarray(ids) if isinstance(ids, np.ndarray) else np.asarray(list(ids), object)
    values = values.reshape(-1)
    if values.dtype.kind not in "OU":
        values = values.astype(str)
    n = values.size
    key = np.full(n, FNV_OFFSET, dtype=np.uint64)
    if n == 0:
        return key
    text = pa.array(values, type=pa.large_string())
    _, offset_buffer, data_buffer = text.buffers()
    offsets = np.frombuffer(offset_buffer, dtype=np.int64, count=n + 1, offset=8 * text.offset)
    data = np.frombuffer(data_buffer, dtype=np.uint8) if data_buffer is not None else None
    start, length = offsets[:-1], np.diff(offsets)
    alive = np.flatnonzero(length > 0)
    position = 0
    while alive.size:
        byte = data[start[alive] + position].astype(np.uint64)  # type: ignore[index]
        key[alive] = (key[alive] ^ byte) * FNV_PRIME
        position += 1
        alive = alive[length[alive] > position]
    return key


def _finalise(x: np.ndarray) -> np.ndarray:
    """splitmix64's finaliser: every input bit moves about half the output bits."""
    x = (x ^ (x >> np.uint64(30))) * _MIX_1
    x = (x ^ (x >> np.uint64(27))) * _MIX_2
    return x ^ (x >> np.uint64(31))


def pair_keys(first, second) -> np.ndarray:
    """Direction-free key of each account pair ``(first[i], second[i])``.

    Parameters
    ----------
    first, second : ndarray of uint64
        Account keys (:func:`account_keys`), equal lengths.

    Returns
    -------
    ndarray of uint64; ``pair_keys(a, b) == pair_keys(b, a)``.
    """
    a = np.asarray(first, dtype=np.uint64).reshape(-1)
    b = np.asarray(second, dtype=np.uint64).reshape(-1)
    if a.shape != b.shape:
        raise ValueError(f"need one second key per first key, got {a.size} and {b.size}")
    a, b = _finalise(a), _finalise(b)
    low, high = np.minimum(a, b), np.maximum(a, b)
    return _finalise(low * _GOLDEN + high)


class PairHistory(Protocol):
    """What the tie counts and the evidence ask of a known-pair history: which keys it
    holds, and which of a window's keys it does not (:class:`KnownPairs` in memory; a Dask
    close may keep it on its workers, :mod:`rolewatch.scale.ties`)."""

    def contains(self, keys) -> np.ndarray: ...

    def new_keys(self, keys) -> np.ndarray: ...


@dataclass(frozen=True)
class KnownPairs:
    """The keys of every account pair that interacted in the windows seen so far.

    ``keys`` is sorted and unique. Build one with :meth:`from_parts` from the per-window
    parts a store keeps (each window's pairs that were new then), then ask
    :meth:`contains`; :meth:`new_keys` gives a window's part to keep.
    """

    keys: np.ndarray

    @classmethod
    def empty(cls) -> KnownPairs:
        return cls(np.zeros(0, dtype=np.uint64))

    @classmethod
    def from_parts(cls, parts: Iterable[np.ndarray]) -> KnownPairs:
        """Union of key arrays (each window's new pairs; any order, duplicates allowed)."""
        arrays = [np.asarray(part, dtype=np.uint64).reshape(-1) for part in parts]
        if not arrays:
            return cls.empty()
        return cls(unique_sorted(np.concatenate(arrays)))

    def __len__(self) -> int:
        return int(self.keys.size)

    def contains(self, keys) -> np.ndarray:
        """Boolean mask: which of ``keys`` are known."""
        query = np.asarray(keys, dtype=np.uint64).reshape(-1)
        if self.keys.size == 0 or query.size == 0:
            return np.zeros(query.size, dtype=bool)
        position = np.minimum(np.searchsorted(self.keys, query), self.keys.size - 1)
        return self.keys[position] == query

    def new_keys(self, keys) -> np.ndarray:
        """The distinct keys among ``keys`` that are not known yet, sorted."""
        distinct = unique_sorted(np.asarray(keys, dtype=np.uint64))
        return distinct[~self.contains(distinct)]

    def with_keys(self, keys) -> KnownPairs:
        """This history plus ``keys`` (one window's pairs)."""
        fresh = self.new_keys(keys)
        if fresh.size == 0:
            return self
        return KnownPairs(unique_sorted(np.concatenate([self.keys, fresh])))
