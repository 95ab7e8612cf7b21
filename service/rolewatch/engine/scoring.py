"""The per-window shift decision shared by the service and the detection benchmark.

Given each account's current role mixture (refitted against the frozen RolX basis,
Henderson et al., KDD 2012) and its baseline mixture (role dynamics, Rossi et al.,
WSDM 2013), :func:`score_window` says which accounts are scored, their shift score and
which of them raise an alert.  It is pure: arrays in, arrays out.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from .shift import DISTANCES, activity_change, role_aware_distance

__all__ = ["ShiftPolicy", "WindowScores", "score_window", "MEASURES", "STATUSES"]

MEASURES = ("role_aware", "hellinger", "jensen_shannon", "total_variation", "cosine")
STATUSES = ("new", "inactive", "low_activity", "scored")


@dataclass(frozen=True)
class ShiftPolicy:
    """How shift scores are computed and when they alert.

    Attributes
    ----------
    measure : str
        Composition distance, one of :data:`MEASURES`.  Default ``"role_aware"``.
    baseline : str
        Baseline mode for :func:`rolewatch.engine.shift.baseline_mixture`.
    last_k, half_life :
        Parameters of the ``mean`` and ``ewm`` baselines.
    alert_mode : str
        ``"threshold"``: alert when score >= ``threshold``.  ``"budget"``: alert on the
        top ``budget`` share of scored accounts by score, provided score >= ``floor``.
    threshold : float
        Default 0.3 (common practice, no source; the detection benchmark tunes it).
    budget : float
        Share in (0, 1] of scored accounts that may alert per window in budget mode.
    floor : float
        Smallest score that may alert in budget mode.
    min_events : float
        Activity (events) an account needs in both windows to be scored.
    magnitude_weight, error_weight : float
        Weights of the activity-change and reconstruction-error components added to the
        composition distance (0 by default: the score is the composition distance).
    """

    measure: str = "role_aware"
    baseline: str = "previous"
    last_k: int = 4
    half_life: float = 2.0
    alert_mode: str = "threshold"
    threshold: float = 0.3
    budget: float = 0.01
    floor: float = 0.1
    min_events: float = 3.0
    magnitude_weight: float = 0.0
    error_weight: float = 0.0

    def __post_init__(self) -> None:
        if self.measure not in MEASURES:
            raise ValueError(f"unknown shift measure {self.measure!r}; use one of {MEASURES}")
        if self.baseline not in ("previous", "mean", "ewm"):
            raise ValueError(
                f"unknown baseline {self.baseline!r}; use 'previous', 'mean' or 'ewm'")
        if self.alert_mode not in ("threshold", "budget"):
            raise ValueError(
                f"unknown alert mode {self.alert_mode!r}; use 'threshold' or 'budget'")
        if not 0 < self.budget <= 1:
            raise ValueError(f"budget must be a share in (0, 1], got {self.budget}")
        if self.last_k < 1 or not self.half_life > 0:
            raise ValueError("last_k must be >= 1 and half_life > 0")
        if self.min_events < 0 or self.magnitude_weight < 0 or self.error_weight < 0:
            raise ValueError("min_events and the component weights must be non-negative")

    def to_dict(self) -> dict:
        """Plain dict (for storing next to the scores it produced)."""
        return asdict(self)


@dataclass(frozen=True, eq=False)
class WindowScores:
    """Per-account outcome of one window (arrays of length n).

    Attributes
    ----------
    score : float array, NaN where not scored
    composition : float array, distance between current and baseline mixtures (NaN
        without both)
    magnitude : float array, activity change ``|log((1+a)/(1+b))|``
    error : float array, current relative reconstruction error
    status : str array, one of :data:`STATUSES` ("new": no baseline; "inactive": no
        current mixture; "low_activity": fewer than ``min_events`` in either window;
        "scored")
    alert : bool array
    """

    score: np.ndarray
    composition: np.ndarray
    magnitude: np.ndarray
    error: np.ndarray
    status: np.ndarray
    alert: np.ndarray


def score_window(current_mixture, baseline_mixture, current_activity, baseline_activity,
                 current_error, F, policy: ShiftPolicy = ShiftPolicy()) -> WindowScores:
    """Score every account's role shift in one window and pick the alerts.

    Parameters
    ----------
    current_mixture, baseline_mixture : ndarray, shape (n, k)
        Rows sum to 1; NaN rows mean no current mixture / no baseline.
    current_activity, baseline_activity : ndarray, shape (n,)
        Events of the account in the current window and in its baseline window(s).
    current_error : ndarray, shape (n,)
        Relative reconstruction error of the current fit.
    F : ndarray, shape (k, f)
        Role profiles (needed for the ``role_aware`` measure).
    policy : ShiftPolicy

    Returns
    -------
    WindowScores

    Notes
    -----
    score = composition + magnitude_weight * magnitude + error_weight * error.
    Budget mode keeps at most ``floor(budget * n_scored)`` accounts (at least one when
    any account is scored and clears the floor), highest scores first, ties by row.
    """
    cur = np.asarray(current_mixture, dtype=np.float64)
    base = np.asarray(baseline_mixture, dtype=np.float64)
    if cur.ndim != 2 or cur.shape != base.shape:
        raise ValueError(
            f"current and baseline mixtures must be n x k arrays of one shape, got "
            f"{cur.shape} and {base.shape}")
    n = cur.shape[0]
    a = np.asarray(current_activity, dtype=np.float64).reshape(-1)
    b = np.asarray(baseline_activity, dtype=np.float64).reshape(-1)
    err = np.asarray(current_error, dtype=np.float64).reshape(-1)
    if not (a.size == b.size == err.size == n):
        raise ValueError("activity and error arrays need one value per account row")
    has_cur = np.isfinite(cur).all(axis=1)
    has_base = np.isfinite(base).all(axis=1)
    if policy.measure == "role_aware":
        comp = role_aware_distance(cur, base, F)
    else:
        comp = DISTANCES[policy.measure](cur, base)
    mag = activity_change(a, b)
    status = np.full(n, "scored", dtype=object)
    low = ~(a >= policy.min_events) | ~(b >= policy.min_events)
    status[low] = "low_activity"
    status[~has_base] = "new"
    status[~has_cur] = "inactive"
    scored = status == "scored"
    err_term = np.where(np.isfinite(err), err, 0.0)
    total = comp + policy.magnitude_weight * mag + policy.error_weight * err_term
    score = np.where(scored & np.isfinite(total), total, np.nan)
    alert = np.zeros(n, dtype=bool)
    finite = np.isfinite(score)
    if policy.alert_mode == "threshold":
        alert[finite] = score[finite] >= policy.threshold
    else:
        idx = np.flatnonzero(finite)
        quota = int(np.floor(policy.budget * idx.size + 1e-9))
        if idx.size and quota == 0:
            quota = 1
        top = idx[np.argsort(-score[idx], kind="stable")][:quota]
        alert[top[score[top] >= policy.floor]] = True
    return WindowScores(score=score, composition=np.where(has_cur & has_base, comp, np.nan),
                        magnitude=mag, error=err, status=status.astype(str), alert=alert)
