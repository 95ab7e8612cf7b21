"""How reproducible a number of roles is: role profiles and dominant roles across resamples.

A number of roles k is only useful to an analyst if the roles come out the same when the
training data changes a little.  Following the resampling view of choosing the number of
clusters (Ben-Hur, Elisseeff & Guyon, "A stability based method for discovering structure
in clustered data", Pacific Symposium on Biocomputing 2002; Lange, Roth, Braun & Buhmann,
"Stability-based validation of clustering solutions", Neural Computation 16(6), 2004), the
role basis is fitted on several random 90 % subsets of the accounts and the fits are
compared two ways:

* **profiles**: the roles of two fits are matched one to one (Hungarian assignment,
  :func:`scipy.optimize.linear_sum_assignment`) on the Hellinger distance between role
  profiles; the agreement is 1 minus the median distance of the matched roles.  The
  median rather than the worst role: early-stopped fits of one k often agree on all roles
  but one, and whether that one matches jumps from k to k, so the worst role made the
  chosen k move with a 90 % resample (docs/roles.md; the median as a robust summary is
  common practice, no source);
* **dominant roles**: every account gets its dominant role under each fit and the
  labelings are compared by the adjusted Rand index (Hubert & Arabie, Journal of
  Classification 2(1), 1985; scikit-learn's ``adjusted_rand_score``).

Profiles decide (accounts that mix roles evenly make dominant roles flip between fits even
when the roles themselves are the same); the dominant-role agreement is reported beside.
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import Executor, ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linear_sum_assignment
from sklearn.metrics import adjusted_rand_score

from .nnls import nnls_rows
from .rowkeys import mixed

__all__ = ["RESAMPLE_FRACTION", "Stability", "resampled_stability", "role_profile_distances"]

RESAMPLE_FRACTION = 0.9
FIT_THREADS = 2  # two threads share the fits: about 1.5x on two cores (measured)
FitBasis = Callable[[np.ndarray, int], np.ndarray]


@dataclass(frozen=True)
class Stability:
    """Agreement across resampled fits, averaged over pairs of fits.

    Attributes
    ----------
    profiles : float
        Mean over pairs of fits of 1 - (median Hellinger distance of the matched roles).
    dominant_ari : float
        Mean adjusted Rand index of the accounts' dominant roles.
    """

    profiles: float
    dominant_ari: float


def resampled_stability(
    V: np.ndarray,
    k: int,
    fit_basis: FitBasis,
    *,
    keys: np.ndarray,
    seed: int,
    resamples: int = 5,
    fraction: float = RESAMPLE_FRACTION,
    pool: Executor | None = None,
) -> Stability:
    """Agreement of role profiles and of dominant roles over fits on resampled rows.

    Parameters
    ----------
    V : ndarray, shape (n, f)
        The reference rows (non-negative).
    k : int
        Number of roles.
    fit_basis : callable
        ``fit_basis(rows, k) -> F`` (k x f), the factorisation to test.
    keys : ndarray of uint64, shape (n,)
        Row keys (:func:`rolewatch.engine.rowkeys.row_keys`); resample r keeps the rows
        whose key, salted by (seed, r), falls in the lowest ``fraction`` of the uint64
        range, so an account is in or out of a resample whatever else changes.
    seed : int
        Salt of the resamples.
    resamples : int
        Number of fits (at least 2).
    fraction : float
        Share of rows in each resample (0.9 by default).
    pool : Executor, optional
        Runs the fits (they are independent and release the GIL in their
        coordinate-descent loops and products; each fit is the same whichever thread runs
        it).  Default: a pool of ``FIT_THREADS`` threads for this call.

    Returns
    -------
    Stability
        With k = 1 both figures are 1.

    Notes
    -----
    Resampling stability after Ben-Hur et al. (2002) and Lange et al. (2004); roles are
    matched as :meth:`rolewatch.engine.basis.RoleBasis.aligned_to` matches them across
    refits; dominant roles are the largest NNLS loading on each fit's F (Kim & Park block
    principal pivoting, :func:`rolewatch.engine.nnls.nnls_rows`) of every account with
    activity, so the labelings cover the same accounts.
    """
    if k <= 1:
        return Stability(1.0, 1.0)
    active = V[np.asarray(V.sum(axis=1) > 0)]
    cut = np.uint64(min(fraction, 1.0) * float(np.iinfo(np.uint64).max))

    def fit_and_label(r: int) -> tuple[np.ndarray, np.ndarray]:
        F = fit_basis(V[mixed(keys, seed * 1_000 + r + 1) <= cut], k)
        return F, np.argmax(nnls_rows(F, active), axis=1)

    runs = range(max(2, int(resamples)))
    if pool is None:
        with ThreadPoolExecutor(max_workers=FIT_THREADS) as own:
            fitted = list(own.map(fit_and_label, runs))
    else:
        fitted = list(pool.map(fit_and_label, runs))
    bases = [F for F, _ in fitted]
    labels = [dominant for _, dominant in fitted]
    profiles, aris = [], []
    for i in range(len(bases)):
        for j in range(i + 1, len(bases)):
            cost = role_profile_distances(bases[i], bases[j])
            rows, cols = linear_sum_assignment(cost)
            profiles.append(1.0 - float(np.median(cost[rows, cols])))
            aris.append(adjusted_rand_score(labels[i], labels[j]))
    return Stability(float(np.mean(profiles)), float(np.mean(aris)))


def role_profile_distances(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Hellinger distances between every row of A and every row of B (each row L1-normalised).

    Used to match roles across bases (:meth:`RoleBasis.aligned_to`).  Hellinger
    distance H(p, q) = (1/sqrt 2) ||sqrt p - sqrt q||_2 (Hellinger 1909; standard
    statistics texts; recalled from memory).  All-zero rows count as uniform.

    Parameters
    ----------
    A : ndarray, shape (k_a, f)
    B : ndarray, shape (k_b, f)
        Non-negative role profiles.

    Returns
    -------
    ndarray, shape (k_a, k_b)
    """

    def norm(X: np.ndarray) -> np.ndarray:
        X = np.asarray(X, dtype=np.float64)
        s = X.sum(axis=1, keepdims=True)
        return np.divide(X, s, out=np.full_like(X, 1.0 / max(X.shape[1], 1)), where=s > 0)

    SA, SB = np.sqrt(norm(A)), np.sqrt(norm(B))
    sq = (SA**2).sum(1)[:, None] + (SB**2).sum(1)[None, :] - 2 * SA @ SB.T
    return np.sqrt(np.clip(sq, 0.0, None) / 2.0)
