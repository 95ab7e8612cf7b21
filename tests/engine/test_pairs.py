"""Account and pair keys, and the known-pair history."""

from __future__ import annotations

import numpy as np

from rolewatch.engine.pairs import KnownPairs, account_keys, pair_keys


def _fnv1a_64(text: str) -> int:
    """FNV-1a, 64 bits, byte by byte as the FNV specification writes it (Fowler, Noll & Vo;
    IETF draft-eastlake-fnv): offset basis 14695981039346656037, prime 1099511628211."""
    value = 14695981039346656037
    for byte in text.encode("utf-8"):
        value ^= byte
        value = (value * 1099511628211) % 2**64
    return value


def test_account_keys_are_fnv1a_64():
    # Test vectors of the FNV specification (as recalled): "" -> cbf29ce484222325,
    # "a" -> af63dc4c8601ec8c, "foobar" -> 85944171f73967e8.
    keys = account_keys(["", "a", "foobar"])
    assert [int(k) for k in keys] == [0xCBF29CE484222325, 0xAF63DC4C8601EC8C, 0x85944171F73967E8]
    # and the vectorised form agrees with the byte loop on ids of mixed lengths and scripts
    ids = ["m-00042", "new-7", "ü-ß", "x" * 57, "acct/2", "7"]
    assert [int(k) for k in account_keys(ids)] == [_fnv1a_64(i) for i in ids]
    # one very long id among short ones, as a list, an object array and numpy text
    ids = ["a", "é" * 200, "", "b-1", "ß" * 3 + "x" * 190]
    expected = [_fnv1a_64(i) for i in ids]
    for form in (ids, np.array(ids, dtype=object), np.array(ids)):
        assert [int(k) for k in account_keys(form)] == expected


def test_pair_keys_ignore_direction_and_separate_pairs():
    rng = np.random.default_rng(5)
    ids = [f"a-{i}" for i in range(400)]
    keys = account_keys(ids)
    first, second = rng.integers(0, 400, 3000), rng.integers(0, 400, 3000)
    forward = pair_keys(keys[first], keys[second])
    np.testing.assert_array_equal(forward, pair_keys(keys[second], keys[first]))
    distinct_pairs = {tuple(sorted(p)) for p in zip(first.tolist(), second.tolist(), strict=True)}
    assert len(np.unique(forward)) == len(distinct_pairs)


def test_known_pairs_behave_like_a_set():
    # Reference: Python's set of the same keys.
    rng = np.random.default_rng(11)
    parts = [rng.integers(0, 2**62, 200, dtype=np.uint64) for _ in range(4)]
    parts[2] = np.concatenate([parts[2], parts[0][:50]])  # a window repeating old pairs
    known = KnownPairs.from_parts(parts[:3])
    reference = {int(k) for part in parts[:3] for k in part}
    assert len(known) == len(reference)
    query = np.concatenate([parts[3], parts[1][:30]])
    np.testing.assert_array_equal(known.contains(query), [int(k) in reference for k in query])
    fresh = known.new_keys(query)
    assert {int(k) for k in fresh} == {int(k) for k in query} - reference
    grown = known.with_keys(query)
    assert {int(k) for k in grown.keys} == reference | {int(k) for k in query}
    assert KnownPairs.empty().contains(query).sum() == 0
