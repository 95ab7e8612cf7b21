"""Non-negative least squares for many right-hand sides at once.

RolX (Henderson et al., "RolX: structural role extraction & mining in large graphs",
KDD 2012) refits node-role memberships G >= 0 against a frozen role matrix F, i.e. it
solves ``min ||v_i - g_i F||_2  s.t. g_i >= 0`` for every node i.  Role dynamics
(Rossi et al., WWW 2012 / WSDM 2013) does this for every snapshot, so it must be fast
for hundreds of thousands of nodes.

The solver is the block principal pivoting method of Kim & Park ("Fast nonnegative
matrix factorization: an active-set-like method and comparisons", SIAM J. Sci. Comput.
33(6), 2011), which is exact (it ends at the KKT point, like Lawson-Hanson's active set
method behind :func:`scipy.optimize.nnls`) and works on all rows together: rows that
share the same passive set are solved with one k x k factorisation, so the work is a
loop over distinct passive-set patterns (at most a few dozen in practice), never over
nodes.
"""

from __future__ import annotations

import numpy as np

__all__ = ["nnls_normal", "nnls_rows"]


def _solve_groups(
    gram: np.ndarray,
    rhs: np.ndarray,
    passive: np.ndarray,
    rows: np.ndarray,
    out: np.ndarray,
    cache: dict,
) -> None:
    """Unconstrained least squares on the passive set, one k x k solve per distinct pattern.

    Rows are sorted by pattern so each group is a contiguous slice; the group's solution
    is ``rhs_slice @ M`` with M the inverse of the passive block of the Gram matrix,
    embedded in a k x k matrix of zeros (so inactive variables come out exactly 0).
    ``cache`` maps a pattern code to its matrix, so each pattern is factorised once.
    """
    k = gram.shape[0]
    codes = passive[rows] @ (1 << np.arange(k, dtype=np.int64))
    order = np.argsort(codes, kind="stable")
    sorted_rows = rows[order]
    sorted_codes = codes[order]
    starts = np.flatnonzero(np.r_[True, sorted_codes[1:] != sorted_codes[:-1]])
    ends = np.r_[starts[1:], len(order)]
    block = rhs[sorted_rows]
    result = np.zeros_like(block)
    for start, end in zip(starts, ends, strict=True):
        code = int(sorted_codes[start])
        if code == 0:
            continue
        M = cache.get(code)
        if M is None:
            idx = np.flatnonzero(passive[sorted_rows[start]])
            sub = gram[np.ix_(idx, idx)]
            try:
                inv = np.linalg.solve(sub, np.eye(idx.size))
            except np.linalg.LinAlgError:  # singular: duplicate roles
                inv = np.linalg.pinv(sub, hermitian=True)
            M = np.zeros((k, k))
            M[np.ix_(idx, idx)] = inv
            cache[code] = M
        result[start:end] = block[start:end] @ M
    out[sorted_rows] = result


def nnls_rows(F: np.ndarray, V: np.ndarray, *, max_iter: int | None = None) -> np.ndarray:
    """Solve ``min ||V[i] - G[i] @ F||_2`` with ``G >= 0`` for every row i at once.

    Parameters
    ----------
    F : ndarray, shape (k, f)
        Fixed non-negative role matrix (rows are role profiles).
    V : ndarray, shape (n, f)
        Rows to explain; must be finite.
    max_iter : int, optional
        Safety bound on pivoting rounds (default ``10 * (k + 1)``); the method normally
        ends in a handful of rounds.

    Returns
    -------
    G : ndarray, shape (n, k)
        Non-negative coefficients; equals :func:`scipy.optimize.nnls` row by row up to
        rounding.

    Notes
    -----
    Block principal pivoting (Kim & Park 2011, Algorithm 2 with the "multiple right-hand
    sides" grouping of their Section 4): keep for each row a passive set P, solve the
    unconstrained problem on P, and exchange every infeasible variable between P and its
    complement; when an exchange fails to reduce the number of infeasible variables three
    times in a row, fall back to exchanging only the largest infeasible index, which
    guarantees termination.
    """
    F = np.asarray(F, dtype=np.float64)
    V = np.asarray(V, dtype=np.float64)
    return nnls_normal(F @ F.T, V @ F.T, max_iter=max_iter)


def nnls_normal(gram: np.ndarray, rhs: np.ndarray, *, max_iter: int | None = None) -> np.ndarray:
    """:func:`nnls_rows` from the normal equations: ``gram = F F^T``, ``rhs = V F^T``.

    The solution depends on V only through ``rhs`` (n x k), so a caller holding a large
    V in a compact dtype can form ``rhs`` in row chunks and never hold V as float64.

    Parameters
    ----------
    gram : ndarray, shape (k, k)
    rhs : ndarray, shape (n, k)
    max_iter : int, optional
        As in :func:`nnls_rows`.

    Returns
    -------
    G : ndarray, shape (n, k)
    """
    gram = np.asarray(gram, dtype=np.float64)
    rhs = np.asarray(rhs, dtype=np.float64)
    n, k = rhs.shape[0], gram.shape[0]
    G = np.zeros((n, k))
    if n == 0 or k == 0:
        return G
    scale = max(float(np.abs(gram).max()), 1e-300)
    # Warm start: the passive set is where the unconstrained solution is positive.
    unconstrained = rhs @ np.linalg.pinv(gram, hermitian=True)
    passive = unconstrained > 0
    cache: dict = {}
    _solve_groups(gram, rhs, passive, np.arange(n), G, cache)
    Y = G @ gram - rhs
    Y[passive] = 0.0
    tol = 1e-12 * scale * max(1.0, float(np.abs(G).max(initial=1.0)))
    alpha = np.full(n, 3, dtype=np.int64)
    beta = np.full(n, k + 1, dtype=np.int64)
    limit = max_iter if max_iter is not None else 10 * (k + 1)
    col = np.arange(k)
    pending = np.arange(n)  # rows that changed last round; the others are optimal
    for _ in range(limit):
        Gp, Yp, Pp = G[pending], Y[pending], passive[pending]
        infeasible = (Pp & (Gp < -tol)) | (~Pp & (Yp < -tol))
        counts = infeasible.sum(axis=1)
        keep = counts > 0
        rows = pending[keep]
        if rows.size == 0:
            break
        infeasible = infeasible[keep]
        c = counts[keep]
        improved = c < beta[rows]
        beta[rows[improved]] = c[improved]
        alpha[rows[improved]] = 3
        stalled = ~improved & (alpha[rows] >= 1)
        alpha[rows[stalled]] -= 1
        full = improved | stalled
        flip = np.zeros((rows.size, k), dtype=bool)
        flip[full] = infeasible[full]
        backup = ~full
        if backup.any():
            last = (k - 1) - np.argmax(infeasible[backup][:, ::-1], axis=1)
            flip[np.flatnonzero(backup)[:, None], col[None, :]] = col[None, :] == last[:, None]
        passive[rows] ^= flip
        _solve_groups(gram, rhs, passive, rows, G, cache)
        Yr = G[rows] @ gram - rhs[rows]
        Yr[passive[rows]] = 0.0
        Y[rows] = Yr
        pending = rows
    np.maximum(G, 0.0, out=G)
    return G
