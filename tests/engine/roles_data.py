"""Synthetic role data shared by the role-engine tests (fictional marketplace accounts)."""

import numpy as np


def planted_roles(k, n=800, f=30, seed=0, noise=0.5):
    """Integer 'binned' feature matrix built from k planted roles plus noise.

    Each role owns a block of features (with a weak background on the others) and most
    nodes are close to one role, like binned ReFeX features of a marketplace graph.
    Returns (V, G, F).
    """
    rng = np.random.default_rng(seed)
    F = rng.gamma(2.0, 0.3, (k, f))
    for r, blk in enumerate(np.array_split(rng.permutation(f), k)):
        F[r, blk] += rng.uniform(2, 5, blk.size)
    G = rng.dirichlet(np.full(k, 0.2), n) * rng.uniform(1, 3, (n, 1))
    V = np.clip(np.rint(G @ F + rng.normal(0, noise, (n, f))), 0, None)
    return V, G, F


class Table:
    """Duck-typed stand-in with the FeatureTable attributes the basis reads."""

    def __init__(self, binned, recipe_version="recipe-a", names=None):
        self.binned = np.asarray(binned, dtype=float)
        self.raw = self.binned.copy()
        self.names = (
            tuple(names)
            if names is not None
            else tuple(f"feat_{j}" for j in range(self.binned.shape[1]))
        )
        self.nodes = np.array([f"member-{i}" for i in range(self.binned.shape[0])])
        self.recipe_version = recipe_version
