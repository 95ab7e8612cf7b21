"""The per-window shift decision shared by the service and the detection benchmark.

Given each account's current role mixture (refitted against the frozen RolX basis,
Henderson et al., KDD 2012) and its baseline mixture (role dynamics, Rossi et al.,
WSDM 2013), :func:`score_window` says which accounts are scored, their shift score and
which of them raise an alert.  It is pure: arrays in, arrays out.

Mixture distances are noisy for accounts with little activity: a member with one or two
payments a week can swing between roles by chance, while a busy shop's mixture barely
moves. Comparing raw distances across accounts therefore ranks quiet accounts first. The
default ``calibration="stratified"`` turns each raw score into a robust z-score *within
its activity stratum* (accounts of similar activity in the same window), so a score says
how unusual the shift is for accounts that active; see :func:`stratified_zscore`.

A role mixture only sees an account's local structure. An account that starts tying two
communities that never dealt with each other (a *bridge*) keeps its mixture, so the score
also takes the rise of its bridging z-score (:mod:`rolewatch.engine.bridging`) over its
baseline window, when the caller passes both, and keeps the larger of the two z-scores.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import ArrayLike

from .shift import DISTANCES, activity_change, role_aware_distance

__all__ = [
    "ShiftPolicy",
    "WindowScores",
    "score_window",
    "stratified_zscore",
    "MEASURES",
    "STATUSES",
    "CALIBRATIONS",
]

MEASURES = ("role_aware", "hellinger", "jensen_shannon", "total_variation", "cosine")
STATUSES = ("new", "inactive", "low_activity", "scored")
CALIBRATIONS = ("stratified", "none")
MAD_SCALE = (
    1.4826  # MAD -> standard deviation for normal data (Rousseeuw & Croux 1993, as recalled)
)


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
        ``"threshold"``: alert when score >= ``threshold``.  ``"budget"`` (default): alert
        on the top ``budget`` share of scored accounts by score, provided score >= ``floor``.
    threshold : float
        Score an alert needs in threshold mode.  With stratified calibration the score is
        a robust z-score, and the default 5.0 was chosen by the detection benchmark
        (docs/detection.md); with ``calibration="none"`` it is a distance in [0, 1].
    budget : float
        Share in (0, 1] of scored accounts that may alert per window in budget mode.
    floor : float
        Smallest score that may alert in budget mode (default 4.0, a robust z-score;
        chosen by the detection benchmark, docs/detection.md).
    min_events : float
        Activity (events) an account needs in both windows to be scored (default 1:
        stratified calibration copes with quiet accounts, and a quiet buyer that is taken
        over has only one or two events in its baseline window).
    magnitude_weight, error_weight : float
        Weights of the activity-change and reconstruction-error components added to the
        composition distance (0 by default: the score is the composition distance).
    calibration : str
        ``"stratified"`` (default): the raw score becomes a robust z-score within the
        window's activity stratum (:func:`stratified_zscore`).  ``"none"``: the raw score.
    stratum_size : int
        Fewest scored accounts one activity stratum may hold; thinner strata are merged
        with the next lower one.
    min_scale : float
        Smallest spread (in raw score units) a stratum may have, so a stratum whose
        accounts all sit still does not turn a tiny move into a huge z-score.
    bridge_communities : int
        Communities the window graph is split into for the bridging component
        (:func:`rolewatch.engine.bridging.community_labels`); 0 turns the component off.
        Default 3 (docs/detection.md: 3 and 4 catch every planted bridge).
    """

    measure: str = "role_aware"
    baseline: str = "previous"
    last_k: int = 4
    half_life: float = 2.0
    alert_mode: str = "budget"
    threshold: float = 5.0
    budget: float = 0.01
    floor: float = 4.0
    min_events: float = 1.0
    magnitude_weight: float = 0.0
    error_weight: float = 0.0
    calibration: str = "stratified"
    stratum_size: int = 25
    min_scale: float = 0.02
    bridge_communities: int = 3

    def __post_init__(self) -> None:
        if self.measure not in MEASURES:
            raise ValueError(f"unknown shift measure {self.measure!r}; use one of {MEASURES}")
        if self.baseline not in ("previous", "mean", "ewm"):
            raise ValueError(f"unknown baseline {self.baseline!r}; use 'previous', 'mean' or 'ewm'")
        if self.alert_mode not in ("threshold", "budget"):
            raise ValueError(f"unknown alert mode {self.alert_mode!r}; use 'threshold' or 'budget'")
        if not 0 < self.budget <= 1:
            raise ValueError(f"budget must be a share in (0, 1], got {self.budget}")
        if self.last_k < 1 or not self.half_life > 0:
            raise ValueError("last_k must be >= 1 and half_life > 0")
        if self.min_events < 0 or self.magnitude_weight < 0 or self.error_weight < 0:
            raise ValueError("min_events and the component weights must be non-negative")
        if self.calibration not in CALIBRATIONS:
            raise ValueError(f"unknown calibration {self.calibration!r}; use one of {CALIBRATIONS}")
        if self.stratum_size < 1 or not self.min_scale > 0:
            raise ValueError("stratum_size must be >= 1 and min_scale > 0")
        if self.bridge_communities < 0 or self.bridge_communities == 1:
            raise ValueError(
                f"bridge_communities must be 0 (off) or >= 2, got {self.bridge_communities}"
            )

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
    bridging : float array, rise of the bridging z-score over the baseline window,
        clipped at 0 (NaN where not scored or not given)
    """

    score: np.ndarray
    composition: np.ndarray
    magnitude: np.ndarray
    error: np.ndarray
    status: np.ndarray
    alert: np.ndarray
    bridging: np.ndarray | None = None


def score_window(
    current_mixture: ArrayLike,
    baseline_mixture: ArrayLike,
    current_activity: ArrayLike,
    baseline_activity: ArrayLike,
    current_error: ArrayLike,
    F: ArrayLike,
    policy: ShiftPolicy = ShiftPolicy(),
    *,
    current_bridging: ArrayLike | None = None,
    baseline_bridging: ArrayLike | None = None,
) -> WindowScores:
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
    current_bridging, baseline_bridging : ndarray, shape (n,), optional
        Bridging z-scores (:func:`rolewatch.engine.bridging.bridging_zscore`) of the
        current window and of the account's baseline window (NaN where unknown). When
        both are given and ``calibration="stratified"``, the score of a scored account is
        ``max(calibrated shift score, current - baseline)``.

    Returns
    -------
    WindowScores

    Notes
    -----
    raw = composition + magnitude_weight * magnitude + error_weight * error; with
    ``calibration="stratified"`` the score is :func:`stratified_zscore` of the raw scores
    of the scored accounts, stratified by ``max(current, baseline)`` activity, and
    clipped at 0 below (a shift smaller than its stratum's median is no shift at all).
    The bridging rise is already a z-score (a Poisson tail within the window), so it is
    compared with the calibrated shift score as it is, not calibrated again.
    Budget mode keeps at most ``floor(budget * n_scored)`` accounts (at least one when
    any account is scored and clears the floor), highest scores first, ties by row.
    """
    cur, base, a, b, err = _as_window_arrays(
        current_mixture, baseline_mixture, current_activity, baseline_activity, current_error
    )
    has_cur = np.isfinite(cur).all(axis=1)
    has_base = np.isfinite(base).all(axis=1)
    comp = _composition(cur, base, F, policy.measure)
    mag = activity_change(a, b)
    status = _statuses(has_cur, has_base, a, b, policy.min_events)
    scored = status == "scored"
    score = _shift_score(comp, mag, err, a, b, scored, policy)
    bridging = np.full(cur.shape[0], np.nan)
    if current_bridging is not None and baseline_bridging is not None:
        bridging = _bridging_rise(current_bridging, baseline_bridging, scored)
        if policy.calibration == "stratified":
            score = np.where(np.isfinite(bridging), np.fmax(score, bridging), score)
    return WindowScores(
        score=score,
        composition=np.where(has_cur & has_base, comp, np.nan),
        magnitude=mag,
        error=err,
        status=status.astype(str),
        alert=_alerts(score, policy),
        bridging=bridging,
    )


def _as_window_arrays(
    current_mixture: ArrayLike,
    baseline_mixture: ArrayLike,
    current_activity: ArrayLike,
    baseline_activity: ArrayLike,
    current_error: ArrayLike,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The inputs of :func:`score_window` as float64 arrays of matching shapes."""
    cur = np.asarray(current_mixture, dtype=np.float64)
    base = np.asarray(baseline_mixture, dtype=np.float64)
    if cur.ndim != 2 or cur.shape != base.shape:
        raise ValueError(
            f"current and baseline mixtures must be n x k arrays of one shape, got "
            f"{cur.shape} and {base.shape}"
        )
    n = cur.shape[0]
    a = np.asarray(current_activity, dtype=np.float64).reshape(-1)
    b = np.asarray(baseline_activity, dtype=np.float64).reshape(-1)
    err = np.asarray(current_error, dtype=np.float64).reshape(-1)
    if not (a.size == b.size == err.size == n):
        raise ValueError("activity and error arrays need one value per account row")
    return cur, base, a, b, err


def _composition(cur: np.ndarray, base: np.ndarray, F: ArrayLike, measure: str) -> np.ndarray:
    """Distance between current and baseline mixtures under the policy's measure."""
    if measure == "role_aware":
        return np.asarray(role_aware_distance(cur, base, F))
    return np.asarray(DISTANCES[measure](cur, base))


def _statuses(
    has_cur: np.ndarray, has_base: np.ndarray, a: np.ndarray, b: np.ndarray, min_events: float
) -> np.ndarray:
    """One of :data:`STATUSES` per account; later rules override earlier ones."""
    status = np.full(has_cur.size, "scored", dtype=object)
    low = ~(a >= min_events) | ~(b >= min_events)
    status[low] = "low_activity"
    status[~has_base] = "new"
    status[~has_cur] = "inactive"
    return status


def _shift_score(
    comp: np.ndarray,
    mag: np.ndarray,
    err: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    scored: np.ndarray,
    policy: ShiftPolicy,
) -> np.ndarray:
    """Raw score of the scored accounts, calibrated within activity strata when asked."""
    err_term = np.where(np.isfinite(err), err, 0.0)
    total = comp + policy.magnitude_weight * mag + policy.error_weight * err_term
    score = np.where(scored & np.isfinite(total), total, np.nan)
    if policy.calibration != "stratified":
        return score
    z = stratified_zscore(
        score, np.fmax(a, b), stratum_size=policy.stratum_size, min_scale=policy.min_scale
    )
    return np.where(np.isfinite(z), np.maximum(z, 0.0), np.nan)


def _bridging_rise(
    current_bridging: ArrayLike, baseline_bridging: ArrayLike, scored: np.ndarray
) -> np.ndarray:
    """Rise of the bridging z-score over the baseline window, clipped at 0.

    NaN where the account is not scored or the rise is not finite.
    """
    now = np.asarray(current_bridging, dtype=np.float64).reshape(-1)
    before = np.asarray(baseline_bridging, dtype=np.float64).reshape(-1)
    if not (now.size == before.size == scored.size):
        raise ValueError("bridging arrays need one value per account row")
    with np.errstate(invalid="ignore"):  # inf - inf: no finite rise, dropped below
        rise = np.maximum(now - before, 0.0)
    return np.where(scored & np.isfinite(rise), rise, np.nan)


def _alerts(score: np.ndarray, policy: ShiftPolicy) -> np.ndarray:
    """Accounts that alert: over the threshold, or the top of the budget over the floor."""
    alert = np.zeros(score.size, dtype=bool)
    finite = np.isfinite(score)
    if policy.alert_mode == "threshold":
        alert[finite] = score[finite] >= policy.threshold
        return alert
    idx = np.flatnonzero(finite)
    quota = int(np.floor(policy.budget * idx.size + 1e-9))
    if idx.size and quota == 0:
        quota = 1
    top = idx[np.argsort(-score[idx], kind="stable")][:quota]
    alert[top[score[top] >= policy.floor]] = True
    return alert


def activity_strata(activity, valid, *, stratum_size: int = 25) -> np.ndarray:
    """Group accounts into activity strata of at least ``stratum_size`` members.

    Base strata are powers of two of activity, ``floor(log2(1 + activity))``; going from
    the busiest stratum down, a stratum joins the next lower one until the group holds
    ``stratum_size`` valid accounts (a thin remainder at the bottom joins the group above
    it). Powers of two are common practice for activity classes (no source).

    Parameters
    ----------
    activity : array_like, shape (n,)
        Events per account.
    valid : array_like of bool, shape (n,)
        Accounts to group; the others (and non-finite activity) get -1.
    stratum_size : int
        Fewest valid accounts per group (see :class:`ShiftPolicy`).

    Returns
    -------
    ndarray of int64, shape (n,)
        Group id per account, 0 for the busiest group; -1 where not ``valid``.
    """
    act = np.asarray(activity, dtype=np.float64)
    valid = np.asarray(valid, dtype=bool) & np.isfinite(act)
    level = np.full(act.size, -1, dtype=np.int64)
    level[valid] = np.floor(np.log2(1.0 + np.maximum(act[valid], 0.0))).astype(np.int64)
    levels, counts = np.unique(level[valid], return_counts=True)
    group_of_level = np.empty(levels.size, dtype=np.int64)
    group, filled = 0, 0
    for position in range(levels.size - 1, -1, -1):  # a loop over strata, not accounts
        group_of_level[position] = group
        filled += counts[position]
        if filled >= stratum_size:
            group, filled = group + 1, 0
    if levels.size and 0 < filled < stratum_size and group > 0:
        group_of_level[group_of_level == group] = group - 1
    out = np.full(act.size, -1, dtype=np.int64)
    out[valid] = group_of_level[np.searchsorted(levels, level[valid])]
    return out


def stratified_zscore(
    score, activity, *, stratum_size: int = 25, min_scale: float = 0.02
) -> np.ndarray:
    """Robust z-score of each finite score within its activity stratum.

    ``z = (s - median) / max(1.4826 * MAD, min_scale)`` over the finite scores of the
    stratum (:func:`activity_strata`); the median absolute deviation scaled by 1.4826
    estimates the standard deviation of normal data (Rousseeuw & Croux, JASA 1993, as
    recalled; common practice).  Median and MAD are robust, so the few accounts that
    really shift do not hide themselves by inflating their stratum's spread.

    Parameters
    ----------
    score : ndarray, shape (n,)
        Raw scores; NaN where the account is not scored (stays NaN).
    activity : ndarray, shape (n,)
        Activity that sets the stratum (events in the busier of the two windows).
    stratum_size, min_scale :
        See :class:`ShiftPolicy`.

    Returns
    -------
    ndarray, shape (n,)
    """
    s = np.asarray(score, dtype=np.float64).reshape(-1)
    groups = activity_strata(activity, np.isfinite(s), stratum_size=stratum_size)
    z = np.full(s.size, np.nan)
    if not (groups >= 0).any():
        return z
    rows = np.flatnonzero(groups >= 0)
    order = rows[np.argsort(groups[rows], kind="stable")]
    bounds = np.flatnonzero(np.diff(groups[order])) + 1
    for members in np.split(order, bounds):  # one pass per stratum
        values = s[members]
        centre = np.median(values)
        spread = MAD_SCALE * np.median(np.abs(values - centre))
        z[members] = (values - centre) / max(spread, min_scale)
    return z
