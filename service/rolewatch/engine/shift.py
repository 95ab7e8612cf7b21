"""Role shift: distances between role mixtures, baselines and evidence.

Role dynamics (Rossi et al., "Modeling dynamic behavior in large evolving graphs",
WSDM 2013; Rossi et al., WWW 2012) tracks each node's role mixture over snapshots
against one frozen RolX basis (Henderson et al., KDD 2012).  A role *shift* is a large
distance between an account's current mixture and its baseline mixture.  All functions
work row-wise on n x k arrays (one row per account) and never loop over accounts;
a row with NaN gives a NaN result and leaves the other rows alone.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = [
    "hellinger",
    "jensen_shannon",
    "total_variation",
    "cosine_distance",
    "role_aware_distance",
    "activity_change",
    "baseline_mixture",
    "feature_moves",
    "DISTANCES",
]


def _rows(p) -> np.ndarray:
    p = np.asarray(p, dtype=np.float64)
    if p.ndim == 1:
        p = p[None, :]
    if p.ndim != 2:
        raise ValueError(f"mixtures must be 1-D or 2-D (accounts x roles), got shape {p.shape}")
    return p


def _normalised(p) -> np.ndarray:
    """Rows scaled to sum 1; rows that are negative, all zero or non-finite become NaN."""
    p = _rows(p)
    s = p.sum(axis=1, keepdims=True)
    bad = ~np.isfinite(p).all(axis=1, keepdims=True) | (p < 0).any(axis=1, keepdims=True) | (s <= 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = p / s
    return np.where(bad, np.nan, out)


def _pair(p, q) -> tuple[np.ndarray, np.ndarray]:
    P, Q = _normalised(p), _normalised(q)
    if P.shape != Q.shape:
        raise ValueError(f"mixtures must have the same shape, got {P.shape} and {Q.shape}")
    return P, Q


def _finish(d: np.ndarray, squeeze: bool) -> np.ndarray | float:
    d = np.clip(d, 0.0, 1.0)
    return float(d[0]) if squeeze else d


def hellinger(p, q):
    """Hellinger distance per row, in [0, 1].

    ``H(p, q) = (1/sqrt 2) * ||sqrt p - sqrt q||_2`` (Hellinger 1909; standard statistics
    texts, recalled from memory).

    Parameters
    ----------
    p, q : array_like, shape (n, k) or (k,)
        Role mixtures, one row per account; rows are normalised to sum 1 first, and a
        negative, all-zero or non-finite row gives NaN.

    Returns
    -------
    ndarray, shape (n,), or float for 1-D input
    """
    P, Q = _pair(p, q)
    d = np.sqrt(0.5 * np.sum((np.sqrt(P) - np.sqrt(Q)) ** 2, axis=1))
    return _finish(d, np.ndim(p) == 1)


def jensen_shannon(p, q):
    """Jensen-Shannon distance per row with base-2 logarithms, in [0, 1].

    The square root of the Jensen-Shannon divergence ``JS = (KL(p||m) + KL(q||m)) / 2``
    with ``m = (p + q) / 2`` (Lin 1991), the same quantity as
    ``scipy.spatial.distance.jensenshannon(p, q, base=2)``.

    Parameters
    ----------
    p, q : array_like, shape (n, k) or (k,)
        Role mixtures, one row per account; rows are normalised to sum 1 first, and a
        negative, all-zero or non-finite row gives NaN.

    Returns
    -------
    ndarray, shape (n,), or float for 1-D input
    """
    P, Q = _pair(p, q)
    M = 0.5 * (P + Q)
    with np.errstate(divide="ignore", invalid="ignore"):
        kp = np.where(P > 0, P * np.log2(P / M), 0.0)
        kq = np.where(Q > 0, Q * np.log2(Q / M), 0.0)
    kp = np.where(np.isnan(P), np.nan, kp)
    kq = np.where(np.isnan(Q), np.nan, kq)
    js = 0.5 * (kp.sum(axis=1) + kq.sum(axis=1))
    return _finish(np.sqrt(np.maximum(js, 0.0)), np.ndim(p) == 1)


def total_variation(p, q):
    """Total variation distance per row, ``(1/2) * sum |p - q|``, in [0, 1].

    Standard statistics texts, recalled from memory; half the L1 distance, as
    ``scipy.spatial.distance.cityblock(p, q) / 2``.

    Parameters
    ----------
    p, q : array_like, shape (n, k) or (k,)
        Role mixtures, one row per account; rows are normalised to sum 1 first, and a
        negative, all-zero or non-finite row gives NaN.

    Returns
    -------
    ndarray, shape (n,), or float for 1-D input
    """
    P, Q = _pair(p, q)
    return _finish(0.5 * np.abs(P - Q).sum(axis=1), np.ndim(p) == 1)


def cosine_distance(p, q):
    """Cosine distance per row, ``1 - p.q / (|p| |q|)``, in [0, 1] for non-negative rows.

    Same quantity as ``scipy.spatial.distance.cosine`` (common practice, no source).

    Parameters
    ----------
    p, q : array_like, shape (n, k) or (k,)
        Role mixtures, one row per account; rows are normalised to sum 1 first, and a
        negative, all-zero or non-finite row gives NaN.

    Returns
    -------
    ndarray, shape (n,), or float for 1-D input
    """
    P, Q = _pair(p, q)
    num = np.sum(P * Q, axis=1)
    den = np.linalg.norm(P, axis=1) * np.linalg.norm(Q, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        d = 1.0 - num / den
    return _finish(d, np.ndim(p) == 1)


def _role_space(F: np.ndarray) -> np.ndarray:
    """Role profiles scaled per feature (to the largest role value) then per role (sum 1).

    Scaling each feature column first keeps features with large binned values from
    drowning the others; features no role uses are dropped.
    """
    F = np.asarray(F, dtype=np.float64)
    if F.ndim != 2 or (F < 0).any() or not np.isfinite(F).all():
        raise ValueError("F must be a finite non-negative roles x features matrix")
    colmax = F.max(axis=0)
    F = F[:, colmax > 0] / colmax[colmax > 0]
    s = F.sum(axis=1, keepdims=True)
    return np.divide(F, s, out=np.full_like(F, 1.0 / max(F.shape[1], 1)), where=s > 0)


_ROWS_PER_BLOCK = 16_384


def role_aware_distance(p, q, F):
    """Distance between mixtures measured through what the roles mean, in [0, 1].

    Each mixture is mapped to the feature profile it stands for, ``p F`` and ``q F``
    (F's columns scaled to the largest role value, rows to sum 1, so both images are
    distributions over features), and the Hellinger distance between the two images
    is returned.  Moving weight between two roles with similar profiles therefore costs
    little; between roles with disjoint profiles it costs as much as plain Hellinger.
    By the data-processing inequality the result never exceeds ``hellinger(p, q)``.

    Parameters
    ----------
    p, q : array_like, shape (n, k) or (k,)
        Role mixtures over the k roles of ``F``.
    F : array_like, shape (k, f)
        Non-negative role profiles of the basis.

    Returns
    -------
    ndarray, shape (n,), or float for 1-D input

    Notes
    -----
    Role profiles are the F of RolX (Henderson et al., KDD 2012); comparing
    reconstructions instead of raw mixtures is our reading of "role-aware" shift in the
    role-dynamics setting (Rossi et al., WSDM 2013).
    """
    P, Q = _rows(p), _rows(q)
    if P.shape != Q.shape:
        raise ValueError(f"mixtures must have the same shape, got {P.shape} and {Q.shape}")
    R = _role_space(F)
    if R.shape[0] != P.shape[1]:
        raise ValueError(f"F has {R.shape[0]} roles but the mixtures have {P.shape[1]}")
    if np.ndim(p) != 2:
        P, Q = _pair(P, Q)
        return float(hellinger(P @ R, Q @ R)[0])
    # Only rows where both mixtures are valid have a distance (the others are NaN, as
    # hellinger gives them); row blocks, normalised block by block, because the images
    # are n x features and the distance's temporaries several times that. Each row
    # depends on its own row only.
    out = np.full(P.shape[0], np.nan)
    for start in range(0, P.shape[0], _ROWS_PER_BLOCK):
        block_p, block_q = _pair(
            P[start : start + _ROWS_PER_BLOCK], Q[start : start + _ROWS_PER_BLOCK]
        )
        valid = np.flatnonzero(np.isfinite(block_p).all(axis=1) & np.isfinite(block_q).all(axis=1))
        out[start + valid] = hellinger(block_p[valid] @ R, block_q[valid] @ R)
    return out


def activity_change(current, baseline):
    """Magnitude of the change in overall activity, ``|log((1 + a) / (1 + b))|`` (natural log).

    Common practice, no source: a symmetric log-ratio that is 0 for no change and
    treats a doubling and a halving alike; the +1 keeps zero activity finite.

    Parameters
    ----------
    current, baseline : array_like
        Events of each account in the current and the baseline window (negative counts
        as 0).

    Returns
    -------
    ndarray
        Same shape as the inputs; NaN where an input is NaN.
    """
    a = np.asarray(current, dtype=np.float64)
    b = np.asarray(baseline, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        return np.abs(np.log1p(np.maximum(a, 0)) - np.log1p(np.maximum(b, 0)))


DISTANCES = {
    "hellinger": hellinger,
    "jensen_shannon": jensen_shannon,
    "total_variation": total_variation,
    "cosine": cosine_distance,
}


def baseline_mixture(
    history, *, mode: str = "previous", last_k: int = 4, half_life: float = 2.0
) -> np.ndarray:
    """Baseline role mixture per account from its mixture history.

    Parameters
    ----------
    history : ndarray, shape (t, n, k)
        Mixtures of n accounts over t consecutive windows, oldest first; a NaN row means
        the account was inactive in that window.
    mode : {"previous", "mean", "ewm"}
        ``previous``: the mixture of the most recent window in which the account was
        active (role dynamics compares consecutive memberships, Rossi et al., WSDM 2013).
        ``mean``: mean over the account's active windows among the last ``last_k``.
        ``ewm``: exponentially weighted mean over all windows, weight
        ``0.5 ** (age / half_life)`` with age in windows (common practice, no source).
    last_k : int
        Window count for ``mean``.
    half_life : float
        Half-life in windows for ``ewm``.

    Returns
    -------
    ndarray, shape (n, k)
        Rows sum to 1; NaN where the account has no active window in scope.
    """
    H = np.asarray(history, dtype=np.float64)
    if H.ndim != 3:
        raise ValueError(f"history must be windows x accounts x roles, got shape {H.shape}")
    t, n, k = H.shape
    if t == 0:
        return np.full((n, k), np.nan)
    active = np.asarray(np.isfinite(H).all(axis=2))
    if mode == "previous":
        last = (t - 1) - np.argmax(active[::-1], axis=0)
        out = H[last, np.arange(n)]
        out[~active.any(axis=0)] = np.nan
    elif mode in ("mean", "ewm"):
        if mode == "mean":
            if last_k < 1:
                raise ValueError(f"last_k must be at least 1, got {last_k}")
            w = np.zeros(t)
            w[-last_k:] = 1.0
        else:
            if not half_life > 0:
                raise ValueError(f"half_life must be positive, got {half_life}")
            w = 0.5 ** ((t - 1 - np.arange(t)) / float(half_life))
        W = w[:, None] * active
        total = W.sum(axis=0)
        acc = np.einsum("tn,tnk->nk", W, np.where(active[:, :, None], H, 0.0))
        with np.errstate(invalid="ignore", divide="ignore"):
            out = acc / total[:, None]
        out[total <= 0] = np.nan
    else:
        raise ValueError(f"unknown baseline mode {mode!r}; use 'previous', 'mean' or 'ewm'")
    return _normalised(out)


def feature_moves(names: Sequence[str], raw_before, raw_after, top: int = 5) -> list[dict]:
    """The features of one account that moved most between two windows.

    Ranked by ``|log1p(after) - log1p(before)|`` (signed log for negative values), so a
    move from 0 to 3 counts more than one from 100 to 103.  Features missing (NaN) in
    either window are skipped.

    Parameters
    ----------
    names : sequence of str
        Feature names, one per value.
    raw_before, raw_after : array_like, shape (f,)
        Raw (unbinned) feature values of the account in the two windows.
    top : int
        Most entries returned.

    Returns
    -------
    list of dict
        ``{"feature", "before", "after", "log_ratio"}``, largest move first, at most
        ``top`` entries, only features that changed.
    """
    before = np.asarray(raw_before, dtype=np.float64).ravel()
    after = np.asarray(raw_after, dtype=np.float64).ravel()
    if not (len(names) == before.size == after.size):
        raise ValueError(
            f"need one before and after value per feature name, got {len(names)} names, "
            f"{before.size} before and {after.size} after values"
        )

    def slog(x: np.ndarray) -> np.ndarray:
        return np.sign(x) * np.log1p(np.abs(x))

    ratio = slog(after) - slog(before)
    ok = np.isfinite(ratio) & (ratio != 0)
    idx = np.flatnonzero(ok)
    idx = idx[np.argsort(-np.abs(ratio[idx]), kind="stable")][: max(int(top), 0)]
    return [
        {
            "feature": str(names[int(i)]),
            "before": float(before[i]),
            "after": float(after[i]),
            "log_ratio": float(ratio[i]),
        }
        for i in idx
    ]
