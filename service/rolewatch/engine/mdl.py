"""RolX model selection: the number of roles by minimum description length.

RolX (Henderson et al., "RolX: structural role extraction & mining in large graphs",
KDD 2012) factorises the binned ReFeX feature matrix V (n x f) as V ~ G F with
non-negative G (n x k) and F (k x f), and chooses k as the one whose factorisation
describes V in the fewest bits: model bits for the quantised G and F plus error bits for V
given G F. :func:`choose_roles` runs that search; :class:`rolewatch.engine.basis.RoleBasis`
keeps the winner.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from sklearn.decomposition import NMF
from sklearn.exceptions import ConvergenceWarning

from .errors import EngineInputError, TooManyRoles

__all__ = [
    "RoleChoice",
    "candidate_role_counts",
    "choose_roles",
    "default_bits_per_value",
    "description_length",
    "fit_nmf",
]

EPS = 1e-12


def default_bits_per_value(V: np.ndarray) -> int:
    """Bits b used to encode one value of G or F in the RolX model cost.

    RolX quantises the entries of G and F before counting their cost (Henderson et al.,
    KDD 2012, Section 3, recalled from memory).  We take b as the number of bits needed
    to tell apart the distinct non-zero values of V, ``ceil(log2(#distinct + 1))``,
    clipped to [1, 32]: a factorisation is never encoded more finely than the data it
    explains.  For binned ReFeX features (small integers) this is a few bits.

    Parameters
    ----------
    V : ndarray, shape (n, f)

    Returns
    -------
    int
    """
    nz = V[V > 0]
    distinct = np.unique(nz).size if nz.size else 0
    return int(min(32, max(1, math.ceil(math.log2(distinct + 1)))))


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
    Henderson et al., KDD 2012, Section 3 ("model selection"), recalled from memory:
    the total description length is L = M + E with M = b k (n + f) for the quantised
    factors and E the KL-divergence cost of encoding V given G F; RolX picks the k with
    the smallest L.  Entries where V = 0 contribute R_ij; entries where R_ij = 0 but
    V_ij > 0 are floored at a tiny R to keep E finite.
    """
    n, f = V.shape
    k = F.shape[0]
    R = np.maximum(G @ F, EPS)
    pos = V > 0
    err = float(np.sum(V[pos] * np.log(V[pos] / R[pos])) - V.sum() + R.sum())
    return float(bits_per_value * k * (n + f)), max(err, 0.0) / math.log(2)


def fit_nmf(V: np.ndarray, k: int, seed: int) -> tuple[np.ndarray, np.ndarray, float]:
    """One scikit-learn NMF fit of V ~ G F (coordinate descent, Frobenius loss, NNDSVDa start).

    The factorisation RolX uses (Henderson et al., KDD 2012), with scikit-learn's default
    stopping rule (tol 1e-4, 500 iterations); the memberships are refitted exactly
    afterwards, so F only needs to be a good basis.

    Parameters
    ----------
    V : ndarray, shape (n, f)
    k : int
        Number of roles.
    seed : int
        ``random_state`` of the NMF.

    Returns
    -------
    G : ndarray, shape (n, k)
    F : ndarray, shape (k, f)
    reconstruction_error : float
    """
    model = NMF(
        n_components=k,
        init="nndsvda",
        solver="cd",
        beta_loss="frobenius",
        max_iter=500,
        tol=1e-4,
        random_state=seed,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        G = model.fit_transform(V)
    return G, model.components_, float(model.reconstruction_err_)


def candidate_role_counts(
    n_roles: int | None, k_range: tuple[int, int], n_features: int, n_rows: int
) -> list[int]:
    """The numbers of roles to try: ``[n_roles]``, or ``k_range`` clipped to the data.

    Parameters
    ----------
    n_roles : int or None
        A fixed number of roles, or None to let MDL choose within ``k_range``.
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


@dataclass(frozen=True)
class RoleChoice:
    """Outcome of :func:`choose_roles`.

    Attributes
    ----------
    G, F : ndarray
        The chosen factorisation of all rows (not yet normalised).
    table : list of dict
        One entry per candidate k: ``k``, ``model_bits``, ``error_bits``, ``total_bits``.
    sample_rows : int
        Rows the candidates were compared on.
    """

    G: np.ndarray
    F: np.ndarray
    table: list[dict[str, float]]
    sample_rows: int


def choose_roles(
    V: np.ndarray,
    candidates: list[int],
    *,
    seed: int,
    bits_per_value: int,
    mdl_max_rows: int | None,
) -> RoleChoice:
    """Fit every candidate k and keep the one of least description length (RolX).

    Parameters
    ----------
    V : ndarray, shape (n, f)
        Usable reference rows.
    candidates : list of int
        Numbers of roles to try (:func:`candidate_role_counts`).
    seed : int
        Random state of the NMF fits and of the row sample.
    bits_per_value : int
        b of :func:`description_length`.
    mdl_max_rows : int or None
        With more than one candidate and more rows than this, candidates are compared
        on a seeded uniform sample of this many rows, and the chosen k is then fitted on
        all rows.

    Returns
    -------
    RoleChoice

    Notes
    -----
    Henderson et al., KDD 2012, Section 3: the smallest ``M + E`` wins, ties to the
    smaller k.
    """
    n = V.shape[0]
    sample = V
    if len(candidates) > 1 and mdl_max_rows is not None and n > mdl_max_rows:
        pick = np.random.default_rng(seed).choice(n, size=int(mdl_max_rows), replace=False)
        sample = V[np.sort(pick)]
    table: list[dict[str, float]] = []
    fits: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    for k in candidates:
        G, F, _ = fit_nmf(sample, k, seed)
        model_bits, error_bits = description_length(sample, G, F, bits_per_value)
        table.append(
            {
                "k": k,
                "model_bits": model_bits,
                "error_bits": error_bits,
                "total_bits": model_bits + error_bits,
            }
        )
        fits[k] = (G, F)
    best = int(min(table, key=lambda row: (row["total_bits"], row["k"]))["k"])
    if sample is not V:
        fits[best] = fit_nmf(V, best, seed)[:2]
    return RoleChoice(*fits[best], table=table, sample_rows=int(sample.shape[0]))
