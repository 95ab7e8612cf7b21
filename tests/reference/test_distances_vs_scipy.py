"""Mixture distances checked against scipy.spatial.distance and published formulas."""

import numpy as np
import pytest
from scipy.spatial import distance

from rolewatch.engine.shift import cosine_distance, hellinger, jensen_shannon, total_variation


def _pairs(seed=0, n=300, k=6):
    rng = np.random.default_rng(seed)
    p = rng.dirichlet(np.full(k, 0.5), n)
    q = rng.dirichlet(np.full(k, 0.5), n)
    p[::7, 0] = 0.0  # zeros in the support
    p /= p.sum(1, keepdims=True)
    return p, q


def test_jensen_shannon_equals_scipy_base_2():
    # Source: scipy.spatial.distance.jensenshannon(p, q, base=2)
    p, q = _pairs()
    ref = np.array([distance.jensenshannon(a, b, base=2) for a, b in zip(p, q, strict=True)])
    np.testing.assert_allclose(jensen_shannon(p, q), ref, atol=1e-12)


def test_cosine_equals_scipy():
    # Source: scipy.spatial.distance.cosine
    p, q = _pairs(1)
    ref = np.array([distance.cosine(a, b) for a, b in zip(p, q, strict=True)])
    np.testing.assert_allclose(cosine_distance(p, q), ref, atol=1e-12)


def test_hellinger_equals_published_formula():
    # Source: H(p, q) = (1/sqrt 2) * ||sqrt p - sqrt q||_2 (Hellinger 1909; standard
    # statistics texts; recalled from memory), evaluated with scipy's euclidean distance.
    p, q = _pairs(2)
    ref = np.array(
        [distance.euclidean(np.sqrt(a), np.sqrt(b)) / np.sqrt(2) for a, b in zip(p, q, strict=True)]
    )
    np.testing.assert_allclose(hellinger(p, q), ref, atol=1e-12)


def test_total_variation_equals_half_cityblock():
    # Source: TV(p, q) = (1/2) * sum |p - q| (standard definition, recalled from memory),
    # evaluated with scipy.spatial.distance.cityblock.
    p, q = _pairs(3)
    ref = np.array([distance.cityblock(a, b) / 2 for a, b in zip(p, q, strict=True)])
    np.testing.assert_allclose(total_variation(p, q), ref, atol=1e-12)


@pytest.mark.parametrize("dist", [hellinger, jensen_shannon, total_variation])
def test_worked_values_identical_and_disjoint(dist):
    # Worked values (recalled from memory): identical -> 0, disjoint supports -> 1.
    assert dist([0.5, 0.5, 0.0], [0.5, 0.5, 0.0]) == pytest.approx(0.0, abs=1e-12)
    assert dist([0.5, 0.5, 0.0], [0.0, 0.0, 1.0]) == pytest.approx(1.0)
    # a worked value with scipy as the source: JS of [1,0] vs [0.5,0.5]
    assert jensen_shannon([1, 0], [0.5, 0.5]) == pytest.approx(
        distance.jensenshannon([1, 0], [0.5, 0.5], base=2)
    )
