"""Role names and descriptions from readable measures, on planted structures."""

import numpy as np
import pytest

from rolewatch.engine.errors import EngineInputError
from rolewatch.engine.naming import describe_roles, format_value
from rolewatch.engine.readable import MEASURES, readable_measures
from rolewatch.engine.snapshot import Snapshot

from .phrases import most_shared_phrase, phrase_rule_holds


def _planted_snapshot() -> Snapshot:
    """Senders paying many strangers, collectors paid by many, and reciprocal circles
    (invented accounts)."""
    actor, target = [], []
    for s in range(6):  # one-way senders, each paying 12 distinct members
        for t in range(12):
            actor.append(f"sender-{s}")
            target.append(f"buyer-{(s * 7 + t) % 40}")
    for c in range(4):  # collectors: 10 members pay each, several times
        for t in range(10):
            for _ in range(3):
                actor.append(f"buyer-{(c * 11 + t) % 40}")
                target.append(f"collector-{c}")
    for g in range(8):  # circles of 5 members all paying each other
        group = [f"circle-{g}-{i}" for i in range(5)]
        for u in group:
            for v in group:
                if u != v:
                    actor.append(u)
                    target.append(v)
    return Snapshot.from_events(actor, target)


def _kinds(snap: Snapshot) -> np.ndarray:
    return np.array([str(n).split("-")[0] for n in snap.nodes])


def _pure_mixture(kinds: np.ndarray, order: list[str]) -> np.ndarray:
    return np.column_stack([(kinds == k).astype(float) for k in order])


def test_planted_roles_are_named_by_what_sets_them_apart():
    snap = _planted_snapshot()
    order = ["sender", "collector", "circle", "buyer"]
    roles = describe_roles(
        (0, 1, 2, 3), _pure_mixture(_kinds(snap), order), readable_measures(snap.counts).values
    )
    by_kind = dict(zip(order, roles, strict=True))
    assert "sender" in by_kind["sender"].name and "many recipients" in by_kind["sender"].name
    assert "receiver" in by_kind["collector"].name
    assert "two-way" in by_kind["circle"].name
    assert len({r.name for r in roles}) == 4
    assert not any("(" in r.name for r in roles)  # no numeric suffixes
    # the typical circle member's figures: 4 counterparts, all both ways, all linked
    circle = by_kind["circle"]
    assert circle.mean["reciprocity"] == 1.0 and circle.mean["clustering"] == 1.0
    assert circle.holders == 40 and circle.level["reciprocity"] > 0.1
    assert phrase_rule_holds([r.description for r in roles]), most_shared_phrase(
        [r.description for r in roles]
    )


def test_roles_alike_get_distinct_names_without_suffixes():
    snap = _planted_snapshot()
    kinds = _kinds(snap)
    circle = kinds == "circle"
    half = circle & (np.arange(len(kinds)) % 2 == 1)
    mixture = np.column_stack(
        [kinds == "sender", circle & ~half, half, (kinds == "buyer") | (kinds == "collector")]
    ).astype(float)
    roles = describe_roles((0, 1, 2, 3), mixture, readable_measures(snap.counts).values)
    names = [r.name for r in roles]
    assert len(set(names)) == 4, names
    assert not any(name.rstrip().endswith(")") for name in names)


def test_every_description_gives_figures_against_the_population():
    snap = _planted_snapshot()
    order = ["sender", "collector", "circle", "buyer"]
    roles = describe_roles(
        (0, 1, 2, 3), _pure_mixture(_kinds(snap), order), readable_measures(snap.counts).values
    )
    for role in roles:
        assert any(ch.isdigit() for ch in role.description)
        # the sender's description speaks of what it sends
    assert (
        "writes to 12 distinct accounts" in roles[0].description
        or "sends 12 events" in roles[0].description
    )


def test_format_value_shows_shares_in_percent_and_counts_plainly():
    assert format_value("reciprocity", 0.254) == "25%"
    assert format_value("events_out", 12.0) == "12"
    assert format_value("events_out", 2.34) == "2.3"
    assert format_value("in_degree", float("nan")) == "–"


def test_misaligned_inputs_are_refused_clearly():
    with pytest.raises(EngineInputError, match="one row per mixture row"):
        describe_roles((0, 1, 2), np.full((5, 3), 1 / 3), np.zeros((4, len(MEASURES))))
    with pytest.raises(EngineInputError, match="n x 3"):
        describe_roles((0, 1, 2), np.full((5, 2), 0.5), np.zeros((5, len(MEASURES))))
