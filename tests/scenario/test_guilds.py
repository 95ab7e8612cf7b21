"""Checks of the fictional guild item-trading generator (rolewatch.scenario.guilds).

Self-consistency checks on invented data, computed from the raw events with numpy, sets
and networkx (see scenario_checks.py); the guild-specific ones check what the module
describes: most trades stay inside a guild, swaps come in pairs, crafters sell to many,
officers collect the guild's deposits, values are whole gold coins.
"""

import sys
from pathlib import Path

import numpy as np
import pytest

from rolewatch.scenario import guilds

sys.path.insert(0, str(Path(__file__).parent))
import scenario_checks as checks  # noqa: E402


@pytest.fixture(scope="module")
def scenario():
    return guilds.generate(seed=11, **checks.SMALL)


def test_most_trades_between_guild_players_stay_inside_the_guild(scenario):
    ev = checks.Events(scenario)
    guild = {a: c for a, c in ev.community.items() if c.startswith("guild-")}
    both = [(guild[a], guild[t]) for a, t in zip(ev.actor, ev.target, strict=True)
            if a in guild and t in guild]  # fmt: skip
    assert np.mean([a == t for a, t in both]) >= 0.6


def test_swaps_come_in_pairs(scenario):
    ev = scenario.events
    swap = ev.kind == "swap"
    seconds = ev.time[swap].astype("int64")
    legs = {}
    for a, t, s in zip(ev.actor[swap].tolist(), ev.target[swap].tolist(), seconds, strict=True):
        legs.setdefault((a, t), []).append(s)
    paired = sum(
        any(abs(s - r) <= 120 for r in legs.get((t, a), ())) for (a, t), times in legs.items()
        for s in times
    )  # fmt: skip
    assert paired >= 0.9 * swap.sum()


def test_crafters_sell_to_many_and_officers_collect_deposits(scenario):
    ev = scenario.events
    planted = {r["account"] for r in scenario.truth}
    acc = scenario.accounts
    kind = dict(zip(acc["id"].tolist(), acc["archetype"].tolist(), strict=True))
    crafters = [a for a, k in kind.items() if k == "crafter" and a not in planted]
    members = [a for a, k in kind.items() if k == "member" and a not in planted]
    sale = ev.kind == "sale"
    sold = [len(set(ev.target[(ev.actor == c) & sale].tolist())) for c in crafters]
    members_sold = [len(set(ev.target[(ev.actor == m) & sale].tolist())) for m in members]
    assert np.median(sold) >= 3 * max(np.median(members_sold), 1)
    # (a reversed officer's deposits turn round, so planted accounts are left out)
    deposit = (ev.kind == "deposit") & ~np.isin(ev.actor, list(planted))
    deposit &= ~np.isin(ev.target, list(planted))
    assert deposit.sum() > 50 and {kind[t] for t in ev.target[deposit].tolist()} == {"officer"}


def test_values_are_whole_gold_coins(scenario):
    assert np.all(scenario.events.weight == np.round(scenario.events.weight))
    assert np.all(scenario.events.weight >= 1)
