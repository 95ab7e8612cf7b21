"""The per-window shift decision shared by the service and the detection benchmark.

Given each account's current role mixture (refitted against the frozen RolX basis,
Henderson et al., KDD 2012), its baseline (role dynamics, Rossi et al., WSDM 2013) and
the tie-level counts of both windows, :func:`score_window` says which accounts are scored,
their shift score and which of them raise an alert.  It is pure: arrays in, arrays out.

The default ``calibration="evidence"`` scores every account by components that each ask
how surprising its change is under an explicit count model of its own past
(:mod:`rolewatch.engine.components`, tests in :mod:`rolewatch.engine.calibration`): the
role-mixture shift as an evidence-weighted chi-square, surges of new counterparts, the
shares of known/new and sent/received ties, and bridging into communities its home never
deals with. The score is the largest component z-score, corrected for how many were
tested; two events cannot make a large score and a busy stratum cannot make a tiny spread
explode, so scores compare across windows and activity levels.

``calibration="stratified"`` keeps the earlier rule (a robust z-score of the mixture
distance within the account's activity stratum, :func:`stratified_zscore`, the larger of
it and the bridging rise), ``"none"`` the raw distance.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from .calibration import combine_zscores
from .components import COMPONENTS, TieEvidence, component_zscores
from .shift import DISTANCES, activity_change, role_aware_distance

__all__ = [
    "ShiftPolicy",
    "TieEvidence",
    "activity_levels",
    "alert_mask",
    "budget_quota",
    "status_codes",
    "status_labels",
    "strata_of_levels",
    "WindowScores",
    "score_window",
    "stratified_zscore",
    "MEASURES",
    "STATUSES",
    "CALIBRATIONS",
]

MEASURES = ("role_aware", "hellinger", "jensen_shannon", "total_variation", "cosine")
STATUSES = ("new", "inactive", "too_little", "low_activity", "scored")
CALIBRATIONS = ("evidence", "stratified", "none")
MAD_SCALE = (
    1.4826  # MAD -> standard deviation for normal data (Rousseeuw & Croux 1993, as recalled)
)


@dataclass(frozen=True)
class ShiftPolicy:
    """How shift scores are computed and when they alert.

    Attributes
    ----------
    measure : str
        Role-mixture distance, one of :data:`MEASURES`.  Default ``"role_aware"``.
    baseline : str
        Baseline mode for :func:`rolewatch.engine.shift.baseline_mixture`.
    last_k, half_life :
        Parameters of the ``mean`` and ``ewm`` baselines.
    alert_mode : str
        ``"threshold"``: alert when score >= ``threshold``.  ``"budget"`` (default): alert
        on the top ``budget`` share of scored accounts by score, provided score >= ``floor``.
    threshold : float
        Score an alert needs in threshold mode (a z-score, except with
        ``calibration="none"``, where it is a distance in [0, 1]).
    budget : float
        Share in (0, 1] of scored accounts that may alert per window in budget mode.
    floor : float
        Smallest score that may alert in budget mode (a z-score; chosen by the detection
        benchmark, docs/detection.md).
    min_events : float
        Activity (events) an account needs in both windows to be scored.
    magnitude_weight, error_weight : float
        ``calibration="stratified"`` / ``"none"`` only: weights of the activity-change and
        reconstruction-error terms added to the distance.
    calibration : str
        ``"evidence"`` (default): the score combines the component z-scores of
        :mod:`rolewatch.engine.components`.  ``"stratified"``: a robust z-score of the
        distance within the window's activity stratum (:func:`stratified_zscore`), the
        larger of it and the bridging rise.  ``"none"``: the raw distance.
    stratum_size : int
        Fewest scored accounts one activity stratum may hold; thinner strata are merged
        with the next lower one (the role component's genomic control, and the
        ``"stratified"`` rule).
    min_scale : float
        ``"stratified"`` only: smallest spread a stratum may have.
    components : tuple of str
        The components the ``"evidence"`` score takes (a subset of
        :data:`rolewatch.engine.components.COMPONENTS`; default all).
    novelty_windows : int
        Earlier active windows an account's rate of new counterparts is estimated from.
    tie_smoothing : float
        Pseudo-counts added to the baseline window in the homogeneity tests.
    bridge_resolution : float
        Resolution of the Leiden communities the bridging component uses
        (:func:`rolewatch.engine.bridging.leiden_communities`); 0 turns bridging off.
    """

    measure: str = "role_aware"
    baseline: str = "previous"
    last_k: int = 4
    half_life: float = 2.0
    alert_mode: str = "budget"
    threshold: float = 5.0
    budget: float = 0.01
    floor: float = 3.5
    min_events: float = 1.0
    magnitude_weight: float = 0.0
    error_weight: float = 0.0
    calibration: str = "evidence"
    stratum_size: int = 25
    min_scale: float = 0.02
    components: tuple[str, ...] = COMPONENTS
    novelty_windows: int = 8
    tie_smoothing: float = 2.0
    bridge_resolution: float = 0.2

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
        unknown = sorted(set(self.components) - set(COMPONENTS))
        if unknown or not self.components:
            raise ValueError(
                f"components must be a non-empty subset of {COMPONENTS}, got {self.components}"
            )
        if self.novelty_windows < 1 or self.tie_smoothing < 0 or self.bridge_resolution < 0:
            raise ValueError(
                "novelty_windows must be >= 1, tie_smoothing and bridge_resolution >= 0"
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
    status : object array of str, one of :data:`STATUSES` ("new": no baseline; "inactive": no
        current mixture; "too_little": no structure to fit a role to (all features zero
        or an empty fit); "low_activity": fewer than ``min_events`` in either window;
        "scored")
    alert : bool array
    bridging : float array, the bridging z-score taken into the score (the rise over the
        baseline with ``"stratified"``), NaN where not scored or not given
    components : dict of str to float array, the component z-scores of the
        ``"evidence"`` score (empty otherwise)
    strongest : object array of str, the component with the largest z-score ("" where
        none)
    detail_rows : int array, optional
        None: every array above holds one value per account. Otherwise ``composition``,
        ``magnitude``, ``error``, ``bridging``, ``components`` and ``strongest`` hold only
        these rows (sorted), in this order: a window scored over parts on a cluster
        brings back the details of its alerted accounts only
        (:mod:`rolewatch.engine.scoring_parts`); :meth:`detail_index` finds a row.

    The two label arrays hold references to a handful of shared strings, 8 bytes an
    account (as numpy fixed-width text they took 4 bytes a character of the longest
    label, 40-48 and 44 bytes an account).
    """

    score: np.ndarray
    composition: np.ndarray
    magnitude: np.ndarray
    error: np.ndarray
    status: np.ndarray
    alert: np.ndarray
    bridging: np.ndarray | None = None
    components: dict[str, np.ndarray] = field(default_factory=dict)
    strongest: np.ndarray | None = None
    detail_rows: np.ndarray | None = None

    def detail_index(self, row: int) -> int:
        """Where account ``row``'s details are in the detail arrays (see ``detail_rows``)."""
        if self.detail_rows is None:
            return row
        at = int(np.searchsorted(self.detail_rows, row))
        if at >= self.detail_rows.size or self.detail_rows[at] != row:
            raise KeyError(f"account row {row} has no details here (only alerted accounts do)")
        return at


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
    ties: TieEvidence | None = None,
    structured: ArrayLike | None = None,
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
    current_bridging : ndarray, shape (n,), optional
        Bridging z-scores of the current window
        (:func:`rolewatch.engine.bridging.bridging_zscore`).
    baseline_bridging : ndarray, shape (n,), optional
        ``"stratified"`` only: the baseline window's bridging z-scores; the rise over them
        is what counts there.
    ties : TieEvidence, optional
        Tie-level counts for the ``"evidence"`` components.
    structured : ndarray of bool, shape (n,), optional
        False where the account's current window holds no structure to fit a role to
        (all features zero, or an empty membership fit): status ``"too_little"``, never
        scored.

    Returns
    -------
    WindowScores

    Notes
    -----
    ``"evidence"``: the score of a scored account is the Sidak-corrected largest component
    z-score (:func:`rolewatch.engine.calibration.combine_zscores`), clipped at 0 below.
    ``"stratified"`` / ``"none"``: see :func:`stratified_zscore`. Budget mode keeps at most
    ``floor(budget * n_scored)`` accounts (at least one when any account is scored and
    clears the floor), highest scores first, ties by row.
    """
    cur, base, a, b, err = _as_window_arrays(
        current_mixture, baseline_mixture, current_activity, baseline_activity, current_error
    )
    has_cur = np.isfinite(cur).all(axis=1)
    has_base = np.isfinite(base).all(axis=1)
    comp = _composition(cur, base, F, policy.measure)
    mag = activity_change(a, b)
    shaped = np.ones(cur.shape[0], dtype=bool) if structured is None else np.asarray(structured)
    if shaped.shape != (cur.shape[0],):
        raise ValueError("structured needs one value per account row")
    # with tie counts, a baseline window counts even where its mixture is unknown (an
    # account with too little structure there still has counts to compare)
    has_prior = has_base if ties is None else np.isfinite(ties.baseline_events).all(axis=1)
    status = status_labels(
        status_codes(has_cur, has_prior, shaped.astype(bool), a, b, policy.min_events)
    )
    scored = status == "scored"
    if policy.calibration == "evidence":
        return _evidence_scores(
            cur,
            base,
            comp,
            mag,
            err,
            a,
            b,
            status,
            policy,
            ties=ties,
            bridging=current_bridging,
            n_roles=np.asarray(F).shape[0],
        )
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
        status=status,
        alert=alert_mask(score, policy),
        bridging=bridging,
    )


def _evidence_scores(
    cur: np.ndarray,
    base: np.ndarray,
    comp: np.ndarray,
    mag: np.ndarray,
    err: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    status: np.ndarray,
    policy: ShiftPolicy,
    *,
    ties: TieEvidence | None,
    bridging: ArrayLike | None,
    n_roles: int,
) -> WindowScores:
    """The ``"evidence"`` score: combined component z-scores of the scored accounts."""
    n = cur.shape[0]
    scored = status == "scored"
    both = np.isfinite(cur).all(axis=1) & np.isfinite(base).all(axis=1)
    if bridging is not None and np.asarray(bridging).shape != (n,):
        raise ValueError("bridging arrays need one value per account row")
    z = component_zscores(
        scored,
        ties=ties,
        bridging=None if bridging is None else np.asarray(bridging, dtype=np.float64),
        distance=np.where(both, comp, np.nan),
        current_events=a,
        baseline_events=b,
        strata=activity_strata(np.fmax(a, b), scored & both, stratum_size=policy.stratum_size),
        n_roles=n_roles,
        smoothing=policy.tie_smoothing,
        wanted=tuple(policy.components),
    )
    names = list(z)
    if names:
        combined, strongest = combine_zscores(np.stack([z[name] for name in names]))
    else:
        combined, strongest = np.full(n, np.nan), np.full(n, -1)
    score = np.where(scored & np.isfinite(combined), np.maximum(combined, 0.0), np.nan)
    label = np.array(names + [""], dtype=object)[np.where(strongest >= 0, strongest, len(names))]
    return WindowScores(
        score=score,
        composition=np.where(both, comp, np.nan),
        magnitude=mag,
        error=err,
        status=status,
        alert=alert_mask(score, policy),
        bridging=z.get("bridging", np.full(n, np.nan)),
        components=z,
        strongest=np.where(np.isfinite(score), label, ""),
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


def status_labels(codes: np.ndarray) -> np.ndarray:
    """:func:`status_codes` as the strings of :data:`STATUSES`: every row refers to one of
    the five shared strings, not a copy of its own."""
    return np.asarray(STATUSES, dtype=object)[codes]


def status_codes(
    has_cur: np.ndarray,
    has_base: np.ndarray,
    structured: np.ndarray,
    a: np.ndarray,
    b: np.ndarray,
    min_events: float,
) -> np.ndarray:
    """Each account's position in :data:`STATUSES` (int8); later rules override earlier
    ones."""
    code = np.full(has_cur.size, STATUSES.index("scored"), dtype=np.int8)
    low = ~(a >= min_events) | ~(b >= min_events)
    code[low] = STATUSES.index("low_activity")
    code[~has_base] = STATUSES.index("new")
    code[~structured] = STATUSES.index("too_little")
    code[~has_cur] = STATUSES.index("inactive")
    return code


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


def alert_mask(score: np.ndarray, policy: ShiftPolicy) -> np.ndarray:
    """Accounts that alert: over the threshold, or the top of the budget over the floor."""
    alert = np.zeros(score.size, dtype=bool)
    finite = np.isfinite(score)
    if policy.alert_mode == "threshold":
        alert[finite] = score[finite] >= policy.threshold
        return alert
    idx = np.flatnonzero(finite)
    quota = budget_quota(idx.size, policy.budget)
    top = idx[np.argsort(-score[idx], kind="stable")][:quota]
    alert[top[score[top] >= policy.floor]] = True
    return alert


def budget_quota(scored: int, budget: float) -> int:
    """How many of ``scored`` accounts with a finite score may alert in budget mode:
    ``floor(budget * scored)``, at least one when any is scored."""
    quota = int(np.floor(budget * scored + 1e-9))
    return 1 if scored and quota == 0 else quota


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
    level = activity_levels(activity, valid)
    held = level >= 0
    group_of_level = strata_of_levels(np.bincount(level[held]), stratum_size=stratum_size)
    out = np.full(level.size, -1, dtype=np.int64)
    out[held] = group_of_level[level[held]]
    return out


def activity_levels(activity, valid) -> np.ndarray:
    """Each valid account's base stratum ``floor(log2(1 + activity))`` (-1: not valid or
    activity not finite); :func:`activity_strata` groups them."""
    act = np.asarray(activity, dtype=np.float64)
    valid = np.asarray(valid, dtype=bool) & np.isfinite(act)
    level = np.full(act.size, -1, dtype=np.int64)
    level[valid] = np.floor(np.log2(1.0 + np.maximum(act[valid], 0.0))).astype(np.int64)
    return level


def strata_of_levels(level_counts, *, stratum_size: int = 25) -> np.ndarray:
    """The group of every base stratum given how many accounts each holds
    (``level_counts[level]``, summed over parts when the accounts are split): see
    :func:`activity_strata`. Levels holding nobody get -1."""
    counts = np.asarray(level_counts, dtype=np.int64)
    levels = np.flatnonzero(counts > 0)
    group_of_level = np.full(counts.size, -1, dtype=np.int64)
    group, filled = 0, 0
    for level in levels[::-1]:  # a loop over strata, not accounts
        group_of_level[level] = group
        filled += int(counts[level])
        if filled >= stratum_size:
            group, filled = group + 1, 0
    if levels.size and 0 < filled < stratum_size and group > 0:
        group_of_level[group_of_level == group] = group - 1
    return group_of_level


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
