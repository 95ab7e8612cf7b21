"""Snapshot -> ReFeX features -> RolX basis -> sense-making, on planted marketplace roles."""

import numpy as np
import pytest

from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.errors import RecipeMismatch
from rolewatch.engine.features import FeatureRecipe
from rolewatch.engine.sensemaking import describe_roles, node_measures

from .test_sensemaking import _star_and_circle_snapshot


@pytest.fixture(scope="module")
def fitted():
    snap = _star_and_circle_snapshot()
    recipe = FeatureRecipe.discover(
        [snap], tolerance=0.0, tolerance_step=0.0
    )  # keep every column of this small graph
    table = recipe.transform(snap)
    return snap, recipe, table, RoleBasis.fit(table, seed=0)


def test_mdl_finds_the_four_planted_kinds_and_names_them(fitted):
    snap, _, table, basis = fitted
    assert basis.n_roles == 4
    assert basis.recipe_version == table.recipe_version
    m = basis.memberships(table)
    names, X = node_measures(snap)
    roles = describe_roles(basis, m, names, X)
    kinds = np.array([str(n).split("-")[0] for n in table.nodes])
    dominant = np.asarray(basis.role_ids)[m.mixture.argmax(axis=1)]
    by_id = {r.role_id: r.name for r in roles}
    expected = {
        "sender": "one-way sender",
        "collector": "collector",
        "circle": "reciprocal circle member",
    }
    for kind, name in expected.items():
        labels = {by_id[d] for d in dominant[kinds == kind]}
        assert labels == {name}, (kind, labels)


def test_table_from_another_recipe_raises_recipe_mismatch(fitted):
    snap, recipe, table, basis = fitted
    other = FeatureRecipe.discover([snap], max_rounds=1)
    assert other.version != recipe.version
    with pytest.raises(RecipeMismatch, match="recipe version"):
        basis.memberships(other.transform(snap))
