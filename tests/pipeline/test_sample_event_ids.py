"""An alert's sample event ids: the first few events (in time order) that involve the
account, from the interned positions or, for a snapshot with other nodes, by looking the
accounts up — against the definition written as a plain loop over the events (no outside
source: the rule is the product's)."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.evidence import _sample_event_ids
from rolewatch.pipeline.loading import interned


def _by_definition(nodes, current, rows, per_account):
    index = {account: i for i, account in enumerate(nodes)}
    wanted = set(int(r) for r in rows)
    samples: dict[int, list[str]] = {}
    events = zip(current.event_id, current.actor, current.target, strict=True)
    for event_id, actor, target in events:
        for node in (index[actor], index[target]):
            if node in wanted:
                found = samples.setdefault(node, [])
                if len(found) < per_account:
                    found.append(str(event_id))
    return samples


def _events(seed: int, n_events: int = 3000, n_accounts: int = 60):
    rng = np.random.default_rng(seed)
    actor = rng.integers(0, n_accounts, n_events)
    target = (actor + rng.integers(1, n_accounts, n_events)) % n_accounts
    names = np.array([f"a-{i:03d}" for i in range(n_accounts)], dtype=object)
    ids = np.array([f"e{i}" for i in range(n_events)], dtype=object)
    return ids, names[actor], names[target], rng.uniform(0.5, 2.0, n_events)


@pytest.mark.parametrize("chunk", [None, 1, 97])
def test_interned_and_looked_up_positions_give_the_defined_samples(monkeypatch, chunk):
    # the events searched all at once, one at a time, and in chunks of 97
    if chunk is not None:
        import rolewatch.pipeline.evidence as evidence

        monkeypatch.setattr(evidence, "SAMPLE_CHUNK_EVENTS", chunk)
    for seed in range(3):
        ids, actor, target, weight = _events(seed)
        current = interned(ids, actor, target, weight)
        snapshot = current.snapshot()
        # the same events with two isolated accounts among the nodes: rows shift by one
        wider = Snapshot.from_events(
            actor, target, weight, nodes=np.concatenate([["0-first"], snapshot.nodes, ["x"]])
        )
        assert not np.array_equal(wider.nodes, snapshot.nodes)
        for nodes in (snapshot, wider):
            rows = np.random.default_rng(seed).choice(nodes.n_nodes, 12, replace=False)
            for per_account in (1, 5):
                expected = _by_definition(list(nodes.nodes), current, rows, per_account)
                assert _sample_event_ids(nodes, current, rows, per_account) == expected


def test_no_rows_no_samples():
    ids, actor, target, weight = _events(0, n_events=10)
    current = interned(ids, actor, target, weight)
    assert _sample_event_ids(current.snapshot(), current, np.array([], dtype=np.int64)) == {}
