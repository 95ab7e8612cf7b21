"""RolX description length: Lloyd-Max quantised factors, model bits and error bits.

RolX (Henderson et al., "RolX: structural role extraction & mining in large graphs",
KDD 2012) factorises the binned ReFeX feature matrix V (n x f) as V ~ G F with
non-negative G (n x k) and F (k x f), and scores a number of roles k by how many bits
the factorisation needs to describe V: the model bits of G and F quantised to b bits per
value, plus the error bits of V given the quantised reconstruction; b and k are both
chosen to make the total smallest.  This module holds that score and the NMF fits it is
computed on; :mod:`rolewatch.engine.selection` combines it with the stability of the
roles to choose k.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from sklearn.decomposition import NMF
from sklearn.exceptions import ConvergenceWarning
from threadpoolctl import threadpool_limits

from .errors import EngineInputError, TooManyRoles
from .nnls import nnls_rows

__all__ = [
    "BITS_TRIED",
    "Encoding",
    "candidate_role_counts",
    "description_length",
    "distinct_rows",
    "fit_nmf",
    "lloyd_max",
    "quantised_description_length",
]

EPS = 1e-12
WARM_FIT_THREADS = 2
BITS_TRIED = tuple(range(1, 9))  # b = 1 .. 8 bits per value of G and F


def lloyd_max(values: np.ndarray, bits: int, *, rounds: int = 30) -> np.ndarray:
    """Quantise ``values`` to ``2**bits`` levels by the Lloyd-Max algorithm.

    Lloyd-Max quantisation (Lloyd, "Least squares quantization in PCM", IEEE Trans.
    Inf. Theory 28(2), 1982; Max, IRE Trans. Inf. Theory 6(1), 1960) alternates two
    steps on one-dimensional data: each value goes to its nearest level (thresholds at
    the midpoints), and each level moves to the mean of its values.  Levels start at the
    quantiles of the values, so the result is deterministic.  RolX quantises G and F
    this way before counting their bits (Henderson et al., KDD 2012, Section 3).

    Parameters
    ----------
    values : ndarray
        Any shape; quantised as one flat sample.
    bits : int
        b >= 1; at most ``2**b`` distinct levels.
    rounds : int
        Most Lloyd rounds (it stops earlier once the levels no longer move).

    Returns
    -------
    ndarray
        Same shape as ``values``, every entry replaced by its level.
    """
    x = np.asarray(values, dtype=np.float64).ravel()
    if x.size == 0:
        return np.asarray(values, dtype=np.float64).copy()
    count = 2 ** int(bits)
    levels = np.unique(np.quantile(x, (np.arange(count) + 0.5) / count))
    for _ in range(rounds):
        index = np.searchsorted((levels[1:] + levels[:-1]) / 2, x)
        members = np.bincount(index, minlength=levels.size)
        sums = np.bincount(index, weights=x, minlength=levels.size)
        moved = np.where(members > 0, sums / np.maximum(members, 1), levels)
        if np.allclose(moved, levels, rtol=1e-9, atol=0.0):
            break
        levels = np.unique(moved)
    index = np.searchsorted((levels[1:] + levels[:-1]) / 2, x)
    return levels[index].reshape(np.shape(values))


def description_length(
    V: np.ndarray, G: np.ndarray, F: np.ndarray, bits_per_value: int
) -> tuple[float, float]:
    """Model and error description lengths (bits) of V ~ G F, as in RolX.

    Parameters
    ----------
    V : ndarray, shape (n, f)
    G : ndarray, shape (n, k)
    F : ndarray, shape (k, f)
    bits_per_value : int
        b, the bits spent per entry of G and F.

    Returns
    -------
    model_bits, error_bits : float
        ``M = b * k * (n + f)`` and ``E = sum_ij V_ij log(V_ij / R_ij) - V_ij + R_ij``
        (the generalised Kullback-Leibler divergence of V from R = G F) converted from
        nats to bits.

    Notes
    -----
    Henderson et al., KDD 2012, Section 3 ("model selection"): the total description
    length is L = M + E with M = b k (n + f) for the quantised factors and E the
    KL-divergence cost of encoding V given G F.  Entries where V = 0 contribute R_ij;
    entries where R_ij = 0 but V_ij > 0 are floored at a tiny R to keep E finite (such
    an entry costs about 28 nats per unit of V, which is what makes too coarse a
    quantisation expensive).
    """
    n, f = V.shape
    k = F.shape[0]
    R = np.maximum(G @ F, EPS)
    pos = V > 0
    err = float(np.sum(V[pos] * np.log(V[pos] / R[pos])) - V.sum() + R.sum())
    return float(bits_per_value * k * (n + f)), max(err, 0.0) / math.log(2)


@dataclass(frozen=True)
class Encoding:
    """The cheapest quantised encoding of a factorisation (quantised_description_length)."""

    bits_per_value: int
    model_bits: float
    error_bits: float

    @property
    def total_bits(self) -> float:
        return self.model_bits + self.error_bits


def quantised_description_length(
    V: np.ndarray, G: np.ndarray, F: np.ndarray, bits: tuple[int, ...] = BITS_TRIED
) -> Encoding:
    """Description length of V by its factorisation, with G and F quantised (RolX).

    For each b in ``bits`` the entries of G and of F are quantised to b bits each by
    :func:`lloyd_max` (one codebook for G, one for F), and the total is
    ``M + E`` of :func:`description_length` computed on the quantised factors, so a
    coarse quantisation pays in error bits what it saves in model bits.  The b with the
    smallest total is kept, as RolX chooses b and k together (Henderson et al.,
    KDD 2012, Section 3).  b is tried upwards and the search stops at the first b that
    does not shorten the total: model bits grow linearly in b while the error saved by
    finer levels shrinks, so the total falls and then rises.

    Parameters
    ----------
    V : ndarray, shape (n, f)
    G : ndarray, shape (n, k)
    F : ndarray, shape (k, f)
    bits : tuple of int
        Values of b to try (default 1 .. 8), ascending; ties go to the smaller b.

    Returns
    -------
    Encoding
    """
    best: Encoding | None = None
    for b in sorted(bits):
        model, error = description_length(V, lloyd_max(G, b), lloyd_max(F, b), b)
        encoding = Encoding(int(b), model, error)
        if best is not None and encoding.total_bits >= best.total_bits:
            break
        best = encoding
    if best is None:
        raise EngineInputError("no bits per value to try; pass at least one b")
    return best


def fit_nmf(
    V: np.ndarray,
    k: int,
    seed: int,
    *,
    tol: float = 1e-4,
    max_iter: int = 500,
    start_basis: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """One scikit-learn NMF fit of V ~ G F (coordinate descent, Frobenius loss).

    The factorisation RolX uses (Henderson et al., KDD 2012).  It starts from NNDSVDa
    (Boutsidis & Gallopoulos, Pattern Recognition 41(4), 2008), or from ``start_basis``
    (a warm start, e.g. a basis fitted on a sample of the rows, with each row's
    non-negative least-squares memberships in it); coordinate descent stops when the
    relative change falls below ``tol`` or after ``max_iter`` rounds (scikit-learn's
    stopping rule).  Memberships are refitted exactly afterwards, so F only needs to be a
    good basis.

    A warm-started fit runs on the distinct rows of V, each scaled by the square root of
    how often it occurs.  Binned feature rows repeat (many quiet accounts look alike: on
    the ``close-1m`` training window 92,843 rows hold 64,355 distinct ones).  For a row
    occurring c times, c * ||v - g F||^2 = ||sqrt(c) v - sqrt(c) g F||^2, and coordinate
    descent is equivariant under that scaling (each row of G is updated from its own row
    of V; F's update sees the same sums G'G and V'G), so the fit follows the path of the
    fit on all rows up to rounding.  Only scikit-learn's stopping test differs: it weighs a
    repeated row's projected gradient by sqrt(c) instead of c.  This fit's products use
    ``WARM_FIT_THREADS`` BLAS threads whatever the caller set (7.2 s against 5.2 s on the
    ``close-1m`` training rows with one and two); the thread count is fixed so that the
    fitted numbers do not depend on the caller's setting.

    Parameters
    ----------
    V : ndarray, shape (n, f)
    k : int
        Number of roles.
    seed : int
        ``random_state`` of the NMF.
    tol, max_iter : float, int
        Stopping rule.
    start_basis : ndarray, shape (k, f), optional
        Initial F, non-negative.

    Returns
    -------
    G : ndarray, shape (n, k)
    F : ndarray, shape (k, f)
    """
    model = NMF(
        n_components=k,
        init="custom" if start_basis is not None else "nndsvda",
        solver="cd",
        beta_loss="frobenius",
        max_iter=max_iter,
        tol=tol,
        random_state=seed,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        if start_basis is None:
            return model.fit_transform(V), model.components_
        F0 = np.array(start_basis, dtype=float)
        first, inverse, counts = distinct_rows(V)
        scale = np.sqrt(counts)[:, None]
        rows = V[first]
        with threadpool_limits(limits=WARM_FIT_THREADS, user_api="blas"):
            G = model.fit_transform(rows * scale, W=nnls_rows(F0, rows) * scale, H=F0)
    return (G / scale)[inverse], model.components_


def distinct_rows(X: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The distinct rows of ``X``: the position of each one's first occurrence, the
    distinct row of every row of ``X`` and how often each occurs (``X`` finite).

    Rows are grouped by their product with a fixed random vector; a row that differs from
    its group's first row (two rows whose products round to the same value) is regrouped
    exactly with :func:`numpy.unique` among such rows.  Equal rows may end up in two
    groups (products that differ in the last bit), which costs speed, never exactness:
    the rows of one group are always equal.

    Returns
    -------
    first : ndarray of int, shape (d,)
    inverse : ndarray of int, shape (n,)
    counts : ndarray of int, shape (d,)
    """
    X = np.ascontiguousarray(X, dtype=float)
    if X.shape[0] == 0:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, empty
    projection = X @ np.random.default_rng(0).standard_normal(X.shape[1])
    inverse, _ = pd.factorize(projection, use_na_sentinel=False)
    _, first = np.unique(inverse, return_index=True)
    stray = np.flatnonzero((X != X[first[inverse]]).any(axis=1))
    if stray.size:
        _, regrouped = np.unique(X[stray], axis=0, return_inverse=True)
        inverse[stray] = len(first) + regrouped.reshape(-1)
        inverse, _ = pd.factorize(inverse)
        _, first = np.unique(inverse, return_index=True)
    counts = np.bincount(inverse, minlength=len(first))
    return first.astype(np.int64), inverse.astype(np.int64), counts


def candidate_role_counts(
    n_roles: int | None, k_range: tuple[int, int], n_features: int, n_rows: int
) -> list[int]:
    """The numbers of roles to try: ``[n_roles]``, or ``k_range`` clipped to the data.

    Parameters
    ----------
    n_roles : int or None
        A fixed number of roles, or None to let the selection choose within ``k_range``.
    k_range : (int, int)
        Smallest and largest k, inclusive.
    n_features, n_rows : int
        Shape of the reference matrix; k never exceeds either.

    Returns
    -------
    list of int

    Raises
    ------
    EngineInputError
        ``n_roles < 1`` or a malformed ``k_range``.
    TooManyRoles
        ``n_roles`` exceeds the number of features or rows.
    """
    if n_roles is not None:
        k = int(n_roles)
        if k < 1:
            raise EngineInputError(f"n_roles must be at least 1, got {k}")
        if k > n_features or k > n_rows:
            raise TooManyRoles(
                f"asked for {k} roles but the reference matrix has only {n_features} "
                f"features and {n_rows} usable rows; ask for at most "
                f"{min(n_features, n_rows)} roles"
            )
        return [k]
    lo, hi = int(k_range[0]), int(k_range[1])
    if lo < 1 or hi < lo:
        raise EngineInputError(f"k_range must be (lo, hi) with 1 <= lo <= hi, got {k_range}")
    hi = min(hi, n_features, n_rows)
    lo = min(lo, hi)
    return list(range(lo, hi + 1))
