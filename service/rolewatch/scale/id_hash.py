"""A stable 64-bit hash of strings held in an Arrow array, computed over their UTF-8 bytes
with numpy (no Python string per value), so every worker sends an event to the same bucket
whatever process reads it.

The hash is FNV-1a, 64-bit (Fowler, Noll and Vo; the parameters of the FNV reference,
IETF draft-eastlake-fnv): for each byte, ``h = (h XOR byte) * prime`` modulo 2**64 from the
offset basis. It is not a defence against chosen ids: it only spreads a window's event ids
over the buckets in which duplicates are found.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["FNV_OFFSET", "FNV_PRIME", "fnv1a_64", "hash_buckets"]

FNV_OFFSET = np.uint64(0xCBF29CE484222325)
FNV_PRIME = np.uint64(0x100000001B3)


def fnv1a_64(values: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """FNV-1a 64 of each string's UTF-8 bytes (a null hashes like the empty string).

    One numpy step per byte position, over the strings at least that long (strings sorted
    by length once, so each step touches only those still going).
    """
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    text = pc.fill_null(values.cast(pa.large_string()), "")
    n = len(text)
    hashes = np.full(n, FNV_OFFSET, dtype=np.uint64)
    if n == 0:
        return hashes
    offsets_buffer, data_buffer = text.buffers()[1], text.buffers()[2]
    offsets = np.frombuffer(offsets_buffer, dtype=np.int64)[text.offset : text.offset + n + 1]
    data = (
        np.frombuffer(data_buffer, dtype=np.uint8)
        if data_buffer is not None
        else np.zeros(0, np.uint8)
    )
    starts, lengths = offsets[:-1], np.diff(offsets)
    by_length = np.argsort(-lengths, kind="stable")  # longest first
    longest = int(lengths[by_length[0]])
    # how many strings are longer than k, for each k: the first `alive[k]` of by_length
    alive = np.searchsorted(-lengths[by_length], -np.arange(longest), side="left")
    with np.errstate(over="ignore"):
        for k in range(longest):
            rows = by_length[: alive[k]]
            byte = data[starts[rows] + k].astype(np.uint64)
            hashes[rows] = (hashes[rows] ^ byte) * FNV_PRIME
    return hashes


def hash_buckets(values: pa.Array | pa.ChunkedArray, buckets: int) -> np.ndarray:
    """Bucket ``0 <= b < buckets`` of each string (its FNV-1a 64 modulo ``buckets``)."""
    return (fnv1a_64(values) % np.uint64(buckets)).astype(np.int64)
