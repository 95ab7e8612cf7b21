"""RolX description length with Lloyd-Max quantised factors (Henderson et al., KDD 2012)."""

import numpy as np
import pytest
from sklearn.cluster import KMeans

from rolewatch.engine.mdl import description_length, lloyd_max, quantised_description_length


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
