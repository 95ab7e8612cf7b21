"""The scenario registry, and the three benchmark scenarios told apart by their structure.

Structure is measured with networkx on the whole run's graph of a small draw:
reciprocity (nx.reciprocity), average clustering (nx.average_clustering) and degree
assortativity (nx.degree_assortativity_coefficient) of the undirected graph, and the
correlation of in- and out-degrees (G.in_degree, G.out_degree). The expected ordering
follows from how each network is built (swaps between guild parties, reply threads,
one-way payments to hubs); the margins are what separates them on this draw.
"""

import sys
from pathlib import Path

import numpy as np
import pytest

from rolewatch.scenario import (
    PLANTED_CHANGES,
    SCENARIOS,
    generate,
    generate_scenario,
)

sys.path.insert(0, str(Path(__file__).parent))
import scenario_checks as checks  # noqa: E402

BENCHMARK = ("forum", "payments", "guilds")


def test_registry_names_every_scenario():
    assert set(SCENARIOS) == {"marketplace", *BENCHMARK}
    assert SCENARIOS["marketplace"] is generate
    assert set(PLANTED_CHANGES) == set(SCENARIOS)


def test_registry_generates_the_marketplace_unchanged():
    via_registry = generate_scenario("marketplace", seed=3, members=300, weeks=8)
    assert checks.same_draw(via_registry, generate(seed=3, members=300, weeks=8))


def test_unknown_scenario_names_the_known_ones():
    with pytest.raises(ValueError, match="forum, guilds, marketplace, payments"):
        generate_scenario("bazaar")


@pytest.fixture(scope="module")
def draws():
    return {name: generate_scenario(name, seed=3, **checks.SMALL) for name in BENCHMARK}


def test_meta_lists_the_planted_changes(draws):
    for name, sc in draws.items():
        assert tuple(sc.meta["changes"]) == PLANTED_CHANGES[name]
        assert sc.meta["name"] == name


def test_scenarios_differ_in_structure(draws):
    m = {name: checks.structure(sc) for name, sc in draws.items()}
    # swaps make the guild network the most reciprocal; payments flow one way
    assert m["guilds"]["reciprocity"] >= m["forum"]["reciprocity"] + 0.1
    assert m["forum"]["reciprocity"] >= m["payments"]["reciprocity"] + 0.25
    # threads and parties close triangles; payments to hubs seldom do (families do)
    assert min(m["forum"]["clustering"], m["guilds"]["clustering"]) >= (
        m["payments"]["clustering"] + 0.05
    )
    # payers and payees are different accounts; posters and traders both send and receive
    assert min(m["forum"]["in_out_correlation"], m["guilds"]["in_out_correlation"]) >= (
        m["payments"]["in_out_correlation"] + 0.3
    )
    # hubs (broadcasters, billers, traders) meet many small accounts in every network
    assert all(-0.6 <= m[name]["assortativity"] <= -0.1 for name in BENCHMARK)


def test_scenarios_draw_different_account_ids_and_event_ids(draws):
    prefixes = {sc.events.id[0].split("-")[0] for sc in draws.values()}
    assert len(prefixes) == 3
    firsts = {sc.accounts["id"][0] for sc in draws.values()}
    assert len(firsts) == 3
    assert all(np.all(sc.accounts["joined_window"] >= 0) for sc in draws.values())
