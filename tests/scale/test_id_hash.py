"""The event-id hash that spreads a window's events over buckets: FNV-1a 64 over UTF-8
bytes, checked against its definition written as a plain Python loop and against the FNV
test values for "", "a" and "foobar" (recalled from memory of the FNV reference's test
suite; the loop confirms them)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from rolewatch.scale.id_hash import fnv1a_64, hash_buckets


def _by_definition(text: str) -> int:
    h = 0xCBF29CE484222325
    for byte in text.encode("utf-8"):
        h = ((h ^ byte) * 0x100000001B3) % 2**64
    return h


def test_the_published_values_and_the_definition():
    got = fnv1a_64(pa.array(["", "a", "foobar"]))
    assert [int(h) for h in got] == [0xCBF29CE484222325, 0xAF63DC4C8601EC8C, 0x85944171F73967E8]
    ids = ["e-10", "évé", "😀-1", "", "mk7-0000001", "x" * 300, "a", "ab", None]
    rng = np.random.default_rng(5)
    ids += ["".join(rng.choice(list("ab-é9"), rng.integers(0, 40))) for _ in range(300)]
    for form in (
        pa.array(ids),
        pa.array(ids, pa.large_string()),
        pa.chunked_array([ids[:4], ids[4:]]),
    ):
        assert [int(h) for h in fnv1a_64(form)] == [_by_definition(i or "") for i in ids]
    # a slice reads its own strings, not the buffer's first ones
    sliced = pa.array(ids).slice(3, 20)
    assert [int(h) for h in fnv1a_64(sliced)] == [_by_definition(i or "") for i in ids[3:23]]


def test_buckets_are_the_hash_modulo_their_count_and_spread_the_ids():
    ids = pa.array([f"evt-{i}" for i in range(20_000)])
    buckets = hash_buckets(ids, 7)
    assert buckets.min() >= 0 and buckets.max() < 7
    assert [int(b) for b in buckets[:50]] == [_by_definition(f"evt-{i}") % 7 for i in range(50)]
    shares = np.bincount(buckets, minlength=7) / 20_000
    assert shares.min() > 0.12 and shares.max() < 0.17  # about 1/7 each
