"""Checks of the fictional regional payments generator (rolewatch.scenario.payments).

Self-consistency checks on invented data, computed from the raw events with numpy, sets
and networkx (see scenario_checks.py); the payments-specific ones check the archetypes the
module describes: merchants are paid by many and pay few, salaries follow a two- or
four-week payroll, families pay each other back, amounts differ by kind.
"""

import sys
from collections import defaultdict
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from rolewatch.scenario import payments

sys.path.insert(0, str(Path(__file__).parent))
import scenario_checks as checks  # noqa: E402


@pytest.fixture(scope="module")
def scenario():
    return payments.generate(seed=11, **checks.SMALL)


def _by_archetype(scenario, name):
    planted = {r["account"] for r in scenario.truth}
    acc = scenario.accounts
    return [a for a, t in zip(acc["id"], acc["archetype"], strict=True)
            if t == name and a not in planted]  # fmt: skip


def test_merchants_are_paid_by_many_and_pay_few(scenario):
    ev = scenario.events
    payers = [
        len(set(ev.actor[ev.target == m].tolist())) for m in _by_archetype(scenario, "merchant")
    ]
    payees = [
        len(set(ev.target[ev.actor == m].tolist())) for m in _by_archetype(scenario, "merchant")
    ]
    assert np.median(payers) >= 3 * max(np.median(payees), 1)


def test_salaries_follow_a_two_or_four_week_payroll(scenario):
    ev = checks.Events(scenario)
    salary = scenario.events.kind == "salary"
    paid = defaultdict(list)
    for boss, worker, w in zip(ev.actor[salary], ev.target[salary], ev.window[salary], strict=True):
        paid[(boss, worker)].append(int(w))
    # a break of the employee's (ordinary or planted) silences a payday, never shifts one
    gaps = [b - a for windows in paid.values() for a, b in zip(windows, windows[1:], strict=False)]
    assert len(paid) > 50 and all(gap % 2 == 0 for gap in gaps)
    assert np.mean([gap in (2, 4) for gap in gaps]) >= 0.9


def test_families_pay_each_other_back(scenario):
    # Transfers both ways between two households are family money (friends seldom pay
    # back); families of two to five make those mutual ties cluster. Measured with
    # networkx's transitivity of the mutual-transfer graph: complete families give 1,
    # the same number of ties at random among these households about its edge density.
    ev = scenario.events
    transfer = ev.kind == "transfer"
    planted = {r["account"] for r in scenario.truth}
    pairs = {(a, t) for a, t in zip(ev.actor[transfer], ev.target[transfer], strict=True)
             if a not in planted and t not in planted and not a.startswith("new-")
             and not t.startswith("new-")}  # fmt: skip
    mutual = nx.Graph([(a, t) for a, t in pairs if (t, a) in pairs])
    assert mutual.number_of_edges() >= 40
    assert nx.transitivity(mutual) >= max(0.25, 10 * nx.density(mutual))


def test_amounts_differ_by_kind(scenario):
    ev = scenario.events
    card = np.median(ev.weight[ev.kind == "card"])
    salary = np.median(ev.weight[ev.kind == "salary"])
    assert salary >= 20 * card
    assert np.all(np.round(ev.weight, 2) == ev.weight)  # cents
