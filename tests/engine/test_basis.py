import json

import numpy as np
import pytest
from scipy.optimize import nnls
from sklearn.decomposition import NMF

from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.errors import FeatureMismatch, RecipeMismatch, TooManyRoles
from rolewatch.engine.mdl import description_length

from .roles_data import Table, planted_roles


@pytest.mark.parametrize("k", [2, 3, 5])
def test_selection_recovers_planted_number_of_roles(k):
    V, _, _ = planted_roles(k, seed=k)
    basis = RoleBasis.fit(V, k_range=(1, 9), seed=0, measure_all=True)
    assert basis.n_roles == k
    table = basis.summary["mdl"]
    assert [row["k"] for row in table] == list(range(1, 10))
    assert basis.summary["selection"] == "mdl+stability"
    assert basis.summary["bits_per_value"] == table[k - 1]["bits_per_value"]


def test_description_length_parts_follow_the_rolx_definition():
    # RolX (Henderson et al., KDD 2012), recalled: M = b*k*(n+f); E = generalised KL in bits.
    rng = np.random.default_rng(3)
    V = rng.integers(0, 6, (20, 7)).astype(float)
    G, F = rng.random((20, 3)), rng.random((3, 7))
    model, error = description_length(V, G, F, bits_per_value=4)
    assert model == 4 * 3 * (20 + 7)
    R = G @ F
    kl = sum(
        v * np.log(v / r) - v + r if v > 0 else r for v, r in zip(V.ravel(), R.ravel(), strict=True)
    )
    assert error == pytest.approx(kl / np.log(2), rel=1e-10)
    assert description_length(V, *_exact(V), 4)[1] == pytest.approx(0.0, abs=1e-6)


def _exact(V):
    return V.copy(), np.eye(V.shape[1])


def test_fit_is_deterministic_and_profiles_sum_to_one():
    V, _, _ = planted_roles(3, seed=1)
    a = RoleBasis.fit(Table(V), k_range=(2, 5), seed=7)
    b = RoleBasis.fit(Table(V), k_range=(2, 5), seed=7)
    assert a.version == b.version
    np.testing.assert_array_equal(a.F, b.F)
    np.testing.assert_allclose(a.F.sum(axis=1), 1.0)
    assert a.recipe_version == "recipe-a"
    assert a.feature_names == Table(V).names
    with pytest.raises(ValueError):
        a.F[0, 0] = 1.0  # frozen


def test_fixed_number_of_roles_and_stacked_tables():
    V, _, _ = planted_roles(3, seed=2)
    basis = RoleBasis.fit([Table(V[:400]), Table(V[400:])], n_roles=4)
    assert basis.n_roles == 4 and basis.summary["rows"] == V.shape[0]
    assert basis.summary["selection"] == "fixed"


def test_memberships_equal_scipy_nnls_node_by_node():
    # Source: scipy.optimize.nnls (Lawson-Hanson active set) solved row by row.
    rng = np.random.default_rng(11)
    for trial in range(4):
        k, f, n = int(rng.integers(2, 8)), 25, 400
        F = rng.gamma(0.7, 1.0, (k, f)) * (rng.random((k, f)) < 0.6)
        F[:, 0] += 0.1  # no empty role
        V = rng.gamma(1.0, 1.0, (n, f)) * (rng.random((n, f)) < 0.5)
        if trial % 2:  # structured: exact mixtures of the roles plus a little noise
            V = rng.random((n, k)) ** 3 @ F + 0.01 * rng.random((n, f))
        basis = RoleBasis(
            F=F / F.sum(1, keepdims=True),
            role_ids=tuple(range(k)),
            feature_names=tuple(f"x{j}" for j in range(f)),
            recipe_version=None,
        )
        m = basis.memberships(V)
        ref = np.array([nnls(basis.F.T, v)[0] for v in V])
        np.testing.assert_allclose(m.loadings, ref, atol=1e-8)
        res_ref = np.linalg.norm(V - ref @ basis.F, axis=1) / np.linalg.norm(V, axis=1)
        np.testing.assert_allclose(m.error, res_ref, atol=1e-10)
        np.testing.assert_allclose(m.mixture.sum(axis=1), 1.0)


def test_fit_reconstruction_no_worse_than_sklearn_nmf():
    # Source: scikit-learn NMF on the same matrix and rank (default settings).
    V, _, _ = planted_roles(4, seed=5)
    basis = RoleBasis.fit(V, n_roles=4, seed=0)
    ours = np.linalg.norm(V - basis.memberships(V).loadings @ basis.F)
    nmf = NMF(n_components=4, random_state=0, max_iter=500)
    W = nmf.fit_transform(V)
    theirs = np.linalg.norm(V - W @ nmf.components_)
    assert ours <= theirs * (1 + 1e-6)


def test_all_zero_rows_get_uniform_mixture_and_zero_error():
    V, _, _ = planted_roles(3, seed=4)
    basis = RoleBasis.fit(V, n_roles=3)
    W = V[:5].copy()
    W[2] = 0.0
    m = basis.memberships(W)
    np.testing.assert_allclose(m.mixture[2], 1 / 3)
    assert m.error[2] == 0.0 and (m.loadings[2] == 0).all()


def test_all_zero_columns_are_harmless():
    V, _, _ = planted_roles(3, seed=4)
    V[:, [0, 5]] = 0.0
    basis = RoleBasis.fit(V, n_roles=3)
    assert np.isfinite(basis.F).all() and np.allclose(basis.F[:, [0, 5]], 0.0)
    assert np.isfinite(basis.memberships(V).mixture).all()


def test_invalid_rows_do_not_spoil_the_others():
    V, _, _ = planted_roles(3, seed=6)
    basis = RoleBasis.fit(V, n_roles=3)
    W = V[:10].copy()
    W[3, 1] = np.nan
    W[7, 2] = -1.0
    m = basis.memberships(W)
    good = basis.memberships(np.delete(W, [3, 7], axis=0))
    assert np.isnan(m.mixture[[3, 7]]).all() and np.isnan(m.error[[3, 7]]).all()
    np.testing.assert_allclose(np.delete(m.mixture, [3, 7], axis=0), good.mixture)
    fitted = RoleBasis.fit(W, n_roles=2)
    assert fitted.summary["rows_dropped"] == 2


def test_more_roles_than_features_is_a_clear_error():
    V = np.random.default_rng(0).integers(0, 5, (50, 4)).astype(float)
    with pytest.raises(TooManyRoles, match="at most 4 roles"):
        RoleBasis.fit(V, n_roles=5)
    with pytest.raises(TooManyRoles):
        RoleBasis(F=np.ones((5, 4)), role_ids=range(5), feature_names="abcd", recipe_version=None)
    # MDL range is clipped instead of failing
    assert RoleBasis.fit(V, k_range=(2, 12), measure_all=True).summary["mdl"][-1]["k"] == 4


def test_table_of_another_recipe_is_rejected():
    V, _, _ = planted_roles(2, seed=0)
    basis = RoleBasis.fit(Table(V, "recipe-a"), n_roles=2)
    with pytest.raises(RecipeMismatch, match="recipe-b.*recipe-a"):
        basis.memberships(Table(V, "recipe-b"))
    with pytest.raises(FeatureMismatch):
        basis.memberships(V[:, :-1])
    with pytest.raises(RecipeMismatch):
        RoleBasis.fit([Table(V, "recipe-a"), Table(V, "recipe-b")])
    # a plain array of the right width carries no version and is accepted
    assert basis.memberships(V).mixture.shape == (V.shape[0], 2)


def test_all_zero_matrix_is_a_clear_error():
    with pytest.raises(ValueError, match="zero"):
        RoleBasis.fit(np.zeros((10, 5)))


def test_json_round_trip():
    V, _, _ = planted_roles(3, seed=8)
    basis = RoleBasis.fit(Table(V), k_range=(2, 5), seed=1)
    text = json.dumps(basis.to_dict())
    back = RoleBasis.from_dict(json.loads(text))
    assert back.version == basis.version and back.role_ids == basis.role_ids
    np.testing.assert_array_equal(back.F, basis.F)
    assert back.summary["mdl"] == basis.summary["mdl"]
    np.testing.assert_array_equal(
        back.memberships(Table(V)).loadings, basis.memberships(Table(V)).loadings
    )
    tampered = json.loads(text)
    tampered["F"][0][0] += 0.5
    with pytest.raises(ValueError, match="corrupted"):
        RoleBasis.from_dict(tampered)


def test_aligned_to_recovers_ids_of_permuted_roles():
    V, _, _ = planted_roles(5, seed=9)
    basis = RoleBasis.fit(Table(V), n_roles=5)
    basis = RoleBasis(
        F=basis.F,
        role_ids=(3, 8, 1, 4, 6),
        feature_names=basis.feature_names,
        recipe_version=basis.recipe_version,
    )
    perm = np.array([2, 4, 0, 3, 1])
    shuffled = RoleBasis(
        F=basis.F[perm],
        role_ids=(0, 1, 2, 3, 4),
        feature_names=basis.feature_names,
        recipe_version="recipe-a",
    )
    back = shuffled.aligned_to(basis)
    original = dict(zip(basis.role_ids, basis.F, strict=True))
    for rid, row in zip(back.role_ids, back.F, strict=True):
        np.testing.assert_array_equal(row, original[rid])
    assert back.summary["aligned_to"]["version"] == basis.version


def test_aligned_to_gives_fresh_ids_to_new_roles_and_uses_shared_features():
    V, _, _ = planted_roles(4, seed=10)
    old = RoleBasis.fit(Table(V), n_roles=3)
    new = RoleBasis.fit(Table(V), n_roles=4)
    aligned = new.aligned_to(old)
    assert set(old.role_ids) <= set(aligned.role_ids)
    assert max(aligned.role_ids) == max(old.role_ids) + 1
    # different feature lists: matched on the intersection
    renamed = RoleBasis(
        F=old.F[:, :-2],
        role_ids=old.role_ids,
        feature_names=old.feature_names[:-2],
        recipe_version="other",
    )
    again = RoleBasis(
        F=old.F[::-1],
        role_ids=(10, 11, 12),
        feature_names=old.feature_names,
        recipe_version="recipe-a",
    ).aligned_to(renamed)
    assert again.role_ids == old.role_ids
    disjoint = RoleBasis(
        F=old.F,
        role_ids=old.role_ids,
        feature_names=tuple(f"z{j}" for j in range(old.F.shape[1])),
        recipe_version=None,
    )
    with pytest.raises(FeatureMismatch):
        new.aligned_to(disjoint)


def test_memberships_satisfy_the_nnls_optimality_conditions():
    # Karush-Kuhn-Tucker conditions of min ||v - gF||^2, g >= 0 (Lawson & Hanson,
    # "Solving Least Squares Problems", 1974; recalled from memory): g >= 0, gradient
    # (gF - v)F^T >= 0, and g * gradient = 0.
    rng = np.random.default_rng(21)
    F = rng.gamma(0.5, 1.0, (7, 30))
    V = rng.gamma(0.8, 1.0, (2000, 30)) * (rng.random((2000, 30)) < 0.4)
    basis = RoleBasis(
        F=F, role_ids=range(7), feature_names=[f"x{j}" for j in range(30)], recipe_version=None
    )
    G = basis.memberships(V).loadings
    grad = (G @ basis.F - V) @ basis.F.T
    scale = np.abs(V @ basis.F.T).max()
    assert (G >= 0).all()
    assert grad.min() >= -1e-10 * scale
    assert np.abs(G * grad).max() <= 1e-10 * scale * max(1.0, G.max())


def test_bad_k_range_is_a_clear_error():
    V, _, _ = planted_roles(2, seed=0)
    with pytest.raises(ValueError, match="k_range"):
        RoleBasis.fit(V, k_range=(5, 2))


def test_selection_on_a_row_sample_still_recovers_k():
    V, _, _ = planted_roles(3, n=1500, seed=12)
    basis = RoleBasis.fit(V, k_range=(1, 6), sample_rows=600)
    assert basis.summary["mdl_rows"] == 600 and basis.summary["rows"] == 1500
    assert basis.n_roles == 3
