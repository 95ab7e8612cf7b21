"""Roles found by the pipeline's recipe, basis and memberships match planted blocks.

Source of the graphs: networkx's ``stochastic_block_model`` (directed=True), which draws
each arc u -> v independently with the probability of the (block of u, block of v) pair
(Holland, Laskey & Leinhardt, "Stochastic blockmodels: first steps", Social Networks 5(2),
1983).  The blocks below differ in how their members send and receive, so an account's
structural role is its block.  Agreement is scikit-learn's ``adjusted_rand_score``
(Hubert & Arabie, Journal of Classification 2(1), 1985) between dominant roles and blocks.
The basis is fitted with the planted number of roles: choosing k is checked on the
scenarios (tests/pipeline/test_role_count.py) and measured on these graphs in docs/roles.md.
"""

import networkx as nx
import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score

from rolewatch.engine import FeatureRecipe, Snapshot
from rolewatch.engine.basis import RoleBasis

SIZES = [120, 120, 120, 120]
# rows send, columns receive: broadcasters send to collectors and relays, relays pass on
# to collectors, collectors only receive, a reciprocal circle talks among itself
PATTERN = [
    [0.00, 0.15, 0.10, 0.00],  # broadcasters
    [0.00, 0.00, 0.00, 0.00],  # collectors
    [0.00, 0.12, 0.00, 0.00],  # relays
    [0.00, 0.00, 0.00, 0.25],  # circle
]


def planted_graph(seed):
    graph = nx.stochastic_block_model(SIZES, PATTERN, seed=seed, directed=True)
    blocks = np.array([graph.nodes[v]["block"] for v in sorted(graph.nodes)])
    names = np.array([f"member-{v:04d}" for v in sorted(graph.nodes)])
    arcs = np.array(list(graph.edges()), dtype=np.int64)
    snapshot = Snapshot.from_events(
        names[arcs[:, 0]], names[arcs[:, 1]], np.ones(len(arcs)), nodes=names
    )
    return snapshot, blocks


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5, 6])
def test_dominant_roles_recover_planted_blocks(seed):
    snapshot, blocks = planted_graph(seed)
    recipe = FeatureRecipe.discover([snapshot])
    table = recipe.transform(snapshot)
    basis = RoleBasis.fit(table, n_roles=len(SIZES), seed=0)
    dominant = np.argmax(basis.memberships(table).mixture, axis=1)
    order = {name: i for i, name in enumerate(table.nodes)}
    index = np.array([order[f"member-{v:04d}"] for v in range(len(blocks))])
    # threshold 0.8 from the role-count acceptance rule (no outside source); reference
    # ARI: sklearn.metrics.adjusted_rand_score; graphs: networkx.stochastic_block_model
    assert adjusted_rand_score(blocks, dominant[index]) >= 0.8
