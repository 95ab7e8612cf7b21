"""Role memberships and fits checked against scipy.optimize.nnls and scikit-learn NMF."""

import numpy as np
import pytest
from scipy.optimize import nnls
from sklearn.decomposition import NMF, non_negative_factorization

from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.nnls import nnls_rows


@pytest.mark.parametrize("seed", range(5))
def test_nnls_rows_equals_scipy_nnls_on_random_matrices(seed):
    # Source: scipy.optimize.nnls, solved node by node.
    rng = np.random.default_rng(seed)
    k, f, n = int(rng.integers(2, 10)), int(rng.integers(10, 40)), 500
    F = rng.gamma(0.5, 1.0, (k, f)) * (rng.random((k, f)) < 0.6)
    V = rng.gamma(1.0, 1.0, (n, f)) * (rng.random((n, f)) < 0.5)
    G = nnls_rows(F, V)
    ref = np.array([nnls(F.T, v)[0] for v in V])
    assert (G >= 0).all()
    np.testing.assert_allclose(G, ref, atol=1e-9)


def test_nnls_rows_on_structured_and_rank_deficient_matrices():
    # Source: scipy.optimize.nnls. With two identical roles the coefficients are not
    # unique, so the residual norms are compared instead.
    rng = np.random.default_rng(42)
    F = rng.gamma(0.5, 1.0, (6, 30))
    V = rng.random((400, 6)) ** 4 @ F  # exact non-negative mixtures
    np.testing.assert_allclose(nnls_rows(F, V), [nnls(F.T, v)[0] for v in V], atol=1e-8)
    F[3] = F[1]
    G = nnls_rows(F, V)
    ours = np.linalg.norm(V - G @ F, axis=1)
    ref = np.array([nnls(F.T, v)[1] for v in V])
    np.testing.assert_allclose(ours, ref, atol=1e-8)


def test_memberships_no_worse_than_sklearn_fixed_h():
    # Source: scikit-learn non_negative_factorization(update_H=False) with F fixed.
    rng = np.random.default_rng(7)
    F = rng.gamma(0.8, 1.0, (5, 25))
    V = rng.gamma(1.0, 1.0, (300, 25))
    basis = RoleBasis(
        F=F / F.sum(1, keepdims=True),
        role_ids=range(5),
        feature_names=[f"x{j}" for j in range(25)],
        recipe_version=None,
    )
    W, _, _ = non_negative_factorization(
        V,
        H=basis.F,
        n_components=5,
        update_H=False,
        init="custom",
        max_iter=2000,
        tol=1e-10,
        solver="cd",
    )
    ours = np.linalg.norm(V - basis.memberships(V).loadings @ basis.F, axis=1)
    theirs = np.linalg.norm(V - W @ basis.F, axis=1)
    assert (ours <= theirs + 1e-9).all()


@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
def test_basis_fit_no_worse_than_sklearn_nmf():
    # Source: scikit-learn NMF, same matrix and rank.
    rng = np.random.default_rng(3)
    V = np.rint(rng.gamma(1.0, 2.0, (600, 20)))
    for k in (2, 4, 6):
        basis = RoleBasis.fit(V, n_roles=k, seed=0)
        ours = np.linalg.norm(V - basis.memberships(V).loadings @ basis.F)
        nmf = NMF(n_components=k, random_state=0, max_iter=500)
        theirs = np.linalg.norm(V - nmf.fit_transform(V) @ nmf.components_)
        assert ours <= theirs * (1 + 1e-6)


def test_memberships_of_compact_bins_equal_scipy_nnls_across_row_blocks():
    # Source: scipy.optimize.nnls on sampled rows. A feature table holds its bins as uint8
    # and memberships work through it in row blocks (40,000 rows is three blocks); the
    # result must not depend on either.
    rng = np.random.default_rng(11)
    k, f, n = 6, 30, 40_000
    F = rng.gamma(0.5, 1.0, (k, f))
    bins = np.minimum(rng.poisson(rng.gamma(1.0, 2.0, (n, 1)), (n, f)), 30).astype(np.uint8)
    basis = RoleBasis(
        F=F / F.sum(1, keepdims=True),
        role_ids=range(k),
        feature_names=[f"x{j}" for j in range(f)],
        recipe_version=None,
    )
    compact = basis.memberships(bins)
    floats = basis.memberships(bins.astype(np.float64))
    np.testing.assert_allclose(compact.loadings, floats.loadings, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(compact.error, floats.error, rtol=1e-12, atol=1e-12)
    sample = rng.choice(n, 300, replace=False)
    ref = np.array([nnls(basis.F.T, bins[i].astype(float))[0] for i in sample])
    np.testing.assert_allclose(compact.loadings[sample], ref, atol=1e-9)
    resid = np.array([nnls(basis.F.T, bins[i].astype(float))[1] for i in sample])
    norms = np.linalg.norm(bins[sample].astype(float), axis=1)
    expected = np.divide(
        resid, norms, out=np.zeros_like(resid), where=norms > 0
    )  # 0 for an all-zero row
    np.testing.assert_allclose(compact.error[sample], expected, rtol=1e-9, atol=1e-12)
