"""Stable keys for reference rows, so that samples follow accounts, not row positions.

Choosing the number of roles compares candidates on a sample of the training rows and
refits them on 90 % resamples (:mod:`rolewatch.engine.selection`).  Drawing those by row
position would change most of the sample whenever one account is added or removed; drawing
them by a hash of the account id (consistent sampling, as in Broder's min-wise hashing,
Compression and Complexity of Sequences 1997) keeps every account's membership fixed, so
training on 90 % of the accounts, or on events with a few duplicates removed, changes the
sample only where the accounts changed.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = ["account_sample", "mixed", "row_keys"]

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def mixed(keys: np.ndarray, salt: int) -> np.ndarray:
    """The splitmix64 finaliser of ``keys xor salt`` (Steele, Lea & Flood, "Fast splittable
    pseudorandom number generators", OOPSLA 2014): a different, well-mixed uint64 order
    of the same keys for every salt."""
    with np.errstate(over="ignore"):
        z = np.asarray(keys, dtype=np.uint64) ^ (np.uint64(salt & 0xFFFFFFFF) * _GOLDEN)
        z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
        z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


def _account_keys(nodes: np.ndarray) -> np.ndarray:
    import pandas as pd

    # distinct ids by a hash table (pandas), not a sort of fixed-width text (4 bytes a
    # character of the longest id for every id)
    index, distinct = pd.factorize(np.asarray(nodes, dtype=object))
    digests = [hashlib.blake2b(x.encode("utf-8"), digest_size=8).digest() for x in distinct]
    return np.frombuffer(b"".join(digests), dtype="<u8")[index].astype(np.uint64)


def row_keys(tables: Any) -> np.ndarray:
    """One uint64 key per stacked row: a hash of the row's account id for tables that
    name their accounts (``nodes``), the row's position otherwise.

    Rows of one account in several windows share the key, so a resample keeps or drops the
    account as a whole.
    """
    if isinstance(tables, np.ndarray) or hasattr(tables, "binned"):
        tables = [tables]
    parts, offset = [], 0
    for table in tables:
        nodes = getattr(table, "nodes", None)
        rows = np.shape(table.binned if hasattr(table, "binned") else table)[0]
        if nodes is not None and len(nodes) == rows:
            parts.append(_account_keys(np.asarray(nodes)))
        else:
            parts.append(mixed(np.arange(offset, offset + rows, dtype=np.uint64), 0))
        offset += rows
    return np.concatenate(parts) if parts else np.zeros(0, dtype=np.uint64)


def account_sample(
    nodes: Sequence[np.ndarray], size: int | None, seed: int = 0
) -> list[np.ndarray] | None:
    """Rows of a seeded sample of at most ``size`` distinct accounts, per window.

    Training fits its bins, pruning and role basis on a sample of accounts when the windows
    hold more (their features still come from the whole graph). The sample is consistent
    (Broder, Compression and Complexity of Sequences 1997): an account is in it when its
    hashed id is among the ``size`` smallest, so it is in or out in every window alike.

    Parameters
    ----------
    nodes : sequence of array of str
        Each training window's account ids, in row order.
    size : int or None
        Most distinct accounts kept; None keeps all.
    seed : int
        Salt of the hash order.

    Returns
    -------
    list of numpy.ndarray or None
        Each window's sampled row positions, ascending; None when the windows hold at most
        ``size`` distinct accounts (nothing to leave out).
    """
    if size is None:
        return None
    if size < 1:
        raise ValueError(f"the account sample needs at least one account, got {size}")
    keys = [mixed(_account_keys(np.asarray(ids)), seed) for ids in nodes]
    distinct = np.unique(np.concatenate(keys)) if keys else np.zeros(0, dtype=np.uint64)
    if distinct.size <= size:
        return None
    cutoff = distinct[size - 1]
    return [np.flatnonzero(k <= cutoff) for k in keys]
