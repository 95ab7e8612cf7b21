"""Checks of the fictional hobby forum generator (rolewatch.scenario.forum).

Self-consistency checks on invented data, computed from the raw events with numpy, sets
and networkx (see scenario_checks.py); the forum-specific ones check the archetypes the
module describes: broadcasters are followed and replied to far more than they write,
moderators reply widely and are answered, lurkers skip most weeks, follows are one-off.
"""

import sys
from pathlib import Path

import numpy as np
import pytest

from rolewatch.scenario import forum

sys.path.insert(0, str(Path(__file__).parent))
import scenario_checks as checks  # noqa: E402


@pytest.fixture(scope="module")
def scenario():
    return forum.generate(seed=11, **checks.SMALL)


def _by_archetype(scenario, name):
    planted = {r["account"] for r in scenario.truth}
    acc = scenario.accounts
    return [a for a, t in zip(acc["id"], acc["archetype"], strict=True)
            if t == name and a not in planted]  # fmt: skip


def test_broadcasters_receive_far_more_than_they_send(scenario):
    ev = scenario.events
    ratios = [
        np.sum(ev.target == a) / max(np.sum(ev.actor == a), 1)
        for a in _by_archetype(scenario, "broadcaster")
    ]
    assert len(ratios) >= 3 and np.median(ratios) >= 3.0


def test_moderators_reply_widely_and_are_answered(scenario):
    ev = scenario.events
    spread, answered = [], []
    for a in _by_archetype(scenario, "moderator"):
        wrote_to = set(ev.target[ev.actor == a].tolist())
        heard_from = set(ev.actor[ev.target == a].tolist())
        spread.append(len(wrote_to))
        answered.append(len(wrote_to & heard_from) / len(wrote_to))
    regulars = [len(set(ev.target[ev.actor == a].tolist()))
                for a in _by_archetype(scenario, "regular")]  # fmt: skip
    assert np.median(spread) >= 2 * np.median(regulars)
    assert np.median(answered) >= 0.3


def test_lurkers_skip_most_windows(scenario):
    ev = checks.Events(scenario)
    weeks = scenario.meta["weeks"]
    shares = [
        np.mean([ev.count(a, w) > 0 for w in range(weeks)])
        for a in _by_archetype(scenario, "lurker")[:150]
    ]
    assert np.median(shares) <= 0.6


def test_follows_are_one_off(scenario):
    # a reversed account's follows turn round, so they are left out
    ev = scenario.events
    turned = [r["account"] for r in scenario.truth if r["change"] == "reversal"]
    follow = (ev.kind == "follow") & ~np.isin(ev.actor, turned) & ~np.isin(ev.target, turned)
    pairs = list(zip(ev.actor[follow].tolist(), ev.target[follow].tolist(), strict=True))
    assert len(pairs) > 100 and len(pairs) == len(set(pairs))


def test_every_event_weighs_one(scenario):
    # the forum has no amounts
    assert np.all(scenario.events.weight == 1.0)
