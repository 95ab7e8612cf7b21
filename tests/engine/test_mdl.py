"""RolX description length with Lloyd-Max quantised factors (Henderson et al., KDD 2012)."""

import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.decomposition import NMF

from rolewatch.engine.mdl import (
    description_length,
    distinct_rows,
    fit_nmf,
    lloyd_max,
    quantised_description_length,
)
from rolewatch.engine.nnls import nnls_rows


@pytest.mark.parametrize("bits", [1, 2, 3])
def test_lloyd_max_levels_equal_one_dimensional_kmeans(bits):
    # Lloyd-Max on scalars is k-means in one dimension (Lloyd, IEEE Trans. Inf. Theory
    # 28(2), 1982); reference: scikit-learn's KMeans (Lloyd's algorithm) from the same start.
    rng = np.random.default_rng(bits)
    x = np.concatenate([rng.gamma(2.0, 1.0, 300), np.zeros(100)])
    ours = lloyd_max(x, bits, rounds=300)
    count = 2**bits
    start = np.unique(np.quantile(x, (np.arange(count) + 0.5) / count))
    km = KMeans(len(start), init=start[:, None], n_init=1, algorithm="lloyd", max_iter=300, tol=0)
    labels = km.fit_predict(x[:, None])
    np.testing.assert_allclose(ours, km.cluster_centers_[labels, 0], rtol=1e-9, atol=1e-12)
    assert np.unique(ours).size <= count


def test_quantised_length_charges_coarse_factors_in_the_error():
    rng = np.random.default_rng(0)
    G, F = rng.gamma(2.0, 1.0, (200, 3)), rng.gamma(2.0, 1.0, (3, 12))
    V = np.rint(G @ F)
    best = quantised_description_length(V, G, F)
    # every b pays b*k*(n+f) model bits (RolX, Section 3); the chosen b is the cheapest total
    for b in range(1, 9):
        model, error = description_length(V, lloyd_max(G, b), lloyd_max(F, b), b)
        assert model == b * 3 * (200 + 12)
        if b <= best.bits_per_value:
            assert model + error >= best.total_bits - 1e-6
    one_bit = description_length(V, lloyd_max(G, 1), lloyd_max(F, 1), 1)
    assert one_bit[1] > best.error_bits


def _binned_features_of_a_classic_graph():
    """Binned ReFeX features of networkx's Les Misérables co-appearance graph (Knuth, The
    Stanford GraphBase, 1993), both directions of each tie: many minor characters share a
    row."""
    import networkx as nx

    from rolewatch.engine import FeatureRecipe, Snapshot

    graph = nx.les_miserables_graph()
    actor, target, weight = zip(*graph.edges(data="weight"), strict=True)
    snapshot = Snapshot.from_events(
        list(actor) + list(target), list(target) + list(actor), list(weight) * 2
    )
    recipe = FeatureRecipe.discover([snapshot], max_rounds=2)
    return np.asarray(recipe.transform(snapshot).binned, dtype=float)


def test_distinct_rows_equal_numpy_unique():
    # reference: numpy.unique over rows (same groups, counts and representatives)
    V = _binned_features_of_a_classic_graph()
    first, inverse, counts = distinct_rows(V)
    unique, unique_inverse, unique_counts = np.unique(
        V, axis=0, return_inverse=True, return_counts=True
    )
    assert len(first) == len(unique) < len(V)
    np.testing.assert_array_equal(V[first][inverse], V)
    assert sorted(counts.tolist()) == sorted(unique_counts.tolist())
    same_group = inverse[:, None] == inverse[None, :]
    np.testing.assert_array_equal(
        same_group, unique_inverse.reshape(-1)[:, None] == unique_inverse.reshape(-1)[None, :]
    )


def test_distinct_rows_survive_a_projection_collision():
    # different rows with the same product with the fixed vector are regrouped exactly
    r = np.random.default_rng(0).standard_normal(2)
    V = np.array([[r[1], -r[0]], [0.0, 0.0], [r[1], -r[0]], [2 * r[1], -2 * r[0]]])
    first, inverse, counts = distinct_rows(V)
    np.testing.assert_array_equal(V[first][inverse], V)
    assert sorted(counts.tolist()) == [1, 1, 2]


def test_warm_started_fit_on_distinct_rows_equals_the_fit_on_all_rows():
    # reference: scikit-learn's NMF (coordinate descent) on every row, from the same start;
    # the distinct-row fit only regroups the same sums, so the factors agree to rounding
    V = _binned_features_of_a_classic_graph()
    rng = np.random.default_rng(1)
    F0 = rng.random((3, V.shape[1]))
    G0 = nnls_rows(F0, V)
    G, F = fit_nmf(V, 3, 0, max_iter=60, tol=0.0, start_basis=F0)
    reference = NMF(3, init="custom", solver="cd", max_iter=60, tol=0.0, random_state=0)
    G_ref = reference.fit_transform(V, W=G0.copy(), H=F0.copy())
    np.testing.assert_allclose(F, reference.components_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(G, G_ref, rtol=1e-9, atol=1e-12)
