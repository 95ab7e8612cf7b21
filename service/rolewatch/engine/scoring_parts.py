"""The ``"evidence"`` shift score of a window whose accounts are split into parts.

:func:`rolewatch.engine.scoring.score_window` takes every account's arrays at once. A window
measured on a cluster has its accounts spread over workers, and its score needs only a few
window-wide statistics besides each account's own numbers: the novelty tests' gamma prior
and growth (sums), the homogeneity tests' population shares (sums), the activity strata
(counts per level), the role component's median per stratum and every count component's
empirical null (medians and median absolute deviations). :func:`score_over_parts` computes
those from small answers of every part (sums merged exactly as in
:func:`rolewatch.engine.calibration.merged_rate_moments`; medians by exact distributed
selection, :func:`rolewatch.engine.order_statistics.grouped_medians`), applies them where
each part lives with the same per-account code as the whole-window path (the ``*_given``
halves of :mod:`rolewatch.engine.calibration`), and picks the alerts by a distributed top-k:
each part offers its own best ``quota`` accounts and the best ``quota`` of those alert.

The result equals ``score_window(..., policy)`` on the same accounts: statuses, alerts and
medians exactly, scores to the last few bits (sums added in another order). Only the
scores and statuses of every account come back, and the details of the alerted ones.

Pure: the caller's :class:`~rolewatch.engine.order_statistics.Parts` decides where parts
live.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .calibration import (
    cell_shares,
    combine_zscores,
    empirical_null_given,
    homogeneity_valid,
    homogeneity_zscore_given,
    merged_rate_moments,
    novelty_law,
    novelty_valid,
    novelty_zscore_given,
    rate_moments,
    role_shift_statistic,
    role_shift_valid,
    role_shift_zscore_given,
)
from .components import COMPONENTS, TieEvidence
from .order_statistics import Parts, grouped_medians
from .scoring import (
    STATUSES,
    ShiftPolicy,
    WindowScores,
    _composition,
    activity_levels,
    budget_quota,
    status_codes,
    status_labels,
    strata_of_levels,
)
from .shift import activity_change

__all__ = ["NULL_COMPONENTS", "score_over_parts", "split_score_inputs"]

# The count components re-standardised by the window's empirical null, in median slots 0-3;
# the role component's strata take the slots after them.
NULL_COMPONENTS = ("novelty_out", "novelty_in", "ties", "direction")
_SCORED = STATUSES.index("scored")


def split_score_inputs(
    bounds: Sequence[int] | np.ndarray,
    mixture: np.ndarray,
    baseline: np.ndarray,
    events: np.ndarray,
    baseline_events: np.ndarray,
    error: np.ndarray,
    ties: TieEvidence,
    *,
    bridging: np.ndarray | None,
    structured: np.ndarray,
) -> list[dict[str, Any]]:
    """The arguments of ``score_window`` cut into parts of rows ``bounds[j]`` to
    ``bounds[j + 1]`` (views, no copies), one mapping per part."""
    columns = {
        "mixture": mixture,
        "baseline": baseline,
        "events": events,
        "baseline_events": baseline_events,
        "error": error,
        "structured": structured,
        "cells": ties.cells,
        "baseline_cells": ties.baseline_cells,
        "tie_events": ties.events,
        "tie_baseline_events": ties.baseline_events,
        "history_new": ties.history_new,
        "history_windows": ties.history_windows,
    }
    parts = []
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        part: dict[str, Any] = {name: values[lo:hi] for name, values in columns.items()}
        part["offset"] = int(lo)
        part["bridging"] = None if bridging is None else bridging[lo:hi]
        parts.append(part)
    return parts


def score_over_parts(parts: Parts, policy: ShiftPolicy, F: np.ndarray) -> WindowScores:
    """Score every account of a window split into ``parts`` (:func:`split_score_inputs`,
    contiguous rows in part order) under ``policy`` (``calibration="evidence"``).

    Returns
    -------
    WindowScores
        ``score``, ``status`` and ``alert`` for every account; the other arrays for the
        alerted accounts only (``detail_rows``).
    """
    if policy.calibration != "evidence":
        raise ValueError("only the 'evidence' calibration is computed over parts")
    F = np.asarray(F, dtype=np.float64)
    parts = parts.map(_prepared, policy, F)
    sums = parts.ask(_part_sums)
    laws = {
        name: novelty_law(merged_rate_moments([answer[name] for answer in sums]))
        for name in NULL_COMPONENTS[:2]
    }
    shares = {
        name: cell_shares(np.sum([answer[name] for answer in sums], axis=0))
        for name in NULL_COMPONENTS[2:]
    }
    longest = max(answer["levels"].size for answer in sums)
    level_counts = np.sum(
        [np.pad(answer["levels"], (0, longest - answer["levels"].size)) for answer in sums],
        axis=0,
    )
    group_of_level = strata_of_levels(level_counts, stratum_size=policy.stratum_size)
    strata = int(group_of_level.max()) + 1 if group_of_level.size else 0
    wanted = tuple(policy.components)
    parts = parts.map(_raw_components, laws, shares, group_of_level, policy.tie_smoothing, wanted)
    slots = len(NULL_COMPONENTS)
    medians = grouped_medians(parts, "median_values", "median_groups", slots + strata)
    parts = parts.map(_deviations, medians[:slots])
    deviations = grouped_medians(parts, "deviation_values", "deviation_groups", slots)
    nulls = np.column_stack([medians[:slots], deviations])
    n_roles = F.shape[0]
    parts = parts.map(_finished, nulls, medians[slots:], n_roles, wanted)
    alerted = _alert_rows(parts, policy)
    return _window_scores(parts, alerted)


def _prepared(part: Mapping[str, Any], policy: ShiftPolicy, F: np.ndarray) -> dict[str, Any]:
    """Each account's status, distance, activity change and what the tests take (as
    ``score_window`` derives them)."""
    cur = np.asarray(part["mixture"], dtype=np.float64)
    base = np.asarray(part["baseline"], dtype=np.float64)
    a = np.asarray(part["events"], dtype=np.float64)
    b = np.asarray(part["baseline_events"], dtype=np.float64)
    has_cur = np.asarray(np.isfinite(cur).all(axis=1))
    has_base = np.asarray(np.isfinite(base).all(axis=1))
    comp = _composition(cur, base, F, policy.measure)
    has_prior = np.isfinite(part["tie_baseline_events"]).all(axis=1)
    structured = np.asarray(part["structured"], dtype=bool)
    status = status_codes(has_cur, has_prior, structured, a, b, policy.min_events)
    scored = status == _SCORED
    both = has_cur & has_base
    distance = np.where(both, comp, np.nan)
    return {
        **part,
        "status": status,
        "scored": scored,
        "composition": distance,
        "magnitude": activity_change(a, b),
        "has_history": scored & (np.asarray(part["history_windows"]) >= 1),
        "has_baseline": scored & np.isfinite(part["baseline_cells"]).all(axis=1),
        "levels": activity_levels(np.fmax(a, b), scored & both),
        "statistic": role_shift_statistic(distance, a, b),
    }


def _novelty_columns(part: Mapping[str, Any], name: str) -> tuple[np.ndarray, ...]:
    """This window's new counterparts, the history's sum and windows of one direction."""
    column = NULL_COMPONENTS.index(name)
    return (
        part["cells"][:, 2 * column + 1],
        part["history_new"][:, column],
        part["history_windows"],
    )


def _homogeneity_columns(part: Mapping[str, Any], name: str) -> tuple[np.ndarray, np.ndarray]:
    """The current and baseline counts one homogeneity test compares."""
    if name == "ties":
        return part["cells"], part["baseline_cells"]
    return part["tie_events"], part["tie_baseline_events"]


def _part_sums(part: Mapping[str, Any]) -> dict[str, np.ndarray]:
    """The part's share of the window's sums: rate moments, tested counts, level counts."""
    out: dict[str, np.ndarray] = {}
    for name in NULL_COMPONENTS[:2]:
        x, total, windows = _novelty_columns(part, name)
        ok = novelty_valid(x, total, windows, part["has_history"])
        out[name] = rate_moments(total[ok], windows[ok], x[ok])
    for name in NULL_COMPONENTS[2:]:
        current, baseline = _homogeneity_columns(part, name)
        ok = homogeneity_valid(current, baseline, part["has_baseline"])
        out[name] = np.asarray(current, dtype=np.float64)[ok].sum(axis=0)
    levels = part["levels"]
    out["levels"] = np.bincount(levels[levels >= 0])
    return out


def _raw_components(
    part: Mapping[str, Any],
    laws: Mapping[str, tuple[float, float, float]],
    shares: Mapping[str, np.ndarray],
    group_of_level: np.ndarray,
    smoothing: float,
    wanted: tuple[str, ...],
) -> dict[str, Any]:
    """Each count component's z-score before its empirical null, each account's stratum,
    and the values whose medians the window needs (slot per null component, then per
    stratum)."""
    raw: dict[str, np.ndarray] = {}
    for name in NULL_COMPONENTS[:2]:
        if name in wanted:
            x, total, windows = _novelty_columns(part, name)
            ok = novelty_valid(x, total, windows, part["has_history"])
            raw[name] = novelty_zscore_given(x, total, windows, ok, laws[name])
    for name in NULL_COMPONENTS[2:]:
        if name in wanted:
            current, baseline = _homogeneity_columns(part, name)
            ok = homogeneity_valid(current, baseline, part["has_baseline"])
            raw[name] = homogeneity_zscore_given(
                current, baseline, ok, shares[name], smoothing=smoothing
            )
    levels = part["levels"]
    strata = np.full(levels.size, -1, dtype=np.int64)
    strata[levels >= 0] = group_of_level[levels[levels >= 0]]
    role_ok = role_shift_valid(part["statistic"], strata, part["scored"])
    values, groups = [], []
    for slot, name in enumerate(NULL_COMPONENTS):
        if name in raw:
            ok = _null_valid(part, name, raw[name])
            values.append(raw[name][ok])
            groups.append(np.full(int(ok.sum()), slot, dtype=np.int64))
    values.append(part["statistic"][role_ok])
    groups.append(len(NULL_COMPONENTS) + strata[role_ok])
    return {
        **part,
        "raw": raw,
        "strata": strata,
        "role_ok": role_ok,
        "median_values": np.concatenate(values),
        "median_groups": np.concatenate(groups),
    }


def _null_valid(part: Mapping[str, Any], name: str, raw: np.ndarray) -> np.ndarray:
    """The scores a count component's empirical null is estimated from."""
    valid = part["has_history"] if name in NULL_COMPONENTS[:2] else part["has_baseline"]
    return valid & np.isfinite(raw)


def _deviations(part: Mapping[str, Any], medians: np.ndarray) -> dict[str, Any]:
    """Each null component's absolute deviations from the window's median."""
    values, groups = [], []
    for slot, name in enumerate(NULL_COMPONENTS):
        if name in part["raw"]:
            ok = _null_valid(part, name, part["raw"][name])
            values.append(np.abs(part["raw"][name][ok] - float(medians[slot])))
            groups.append(np.full(int(ok.sum()), slot, dtype=np.int64))
    held = {key: value for key, value in part.items() if not key.startswith("median_")}
    return {
        **held,
        "deviation_values": np.concatenate(values) if values else np.zeros(0),
        "deviation_groups": np.concatenate(groups) if groups else np.zeros(0, dtype=np.int64),
    }


def _finished(
    part: Mapping[str, Any],
    nulls: np.ndarray,
    role_medians: np.ndarray,
    n_roles: int,
    wanted: tuple[str, ...],
) -> dict[str, Any]:
    """Every component's z-score with the window's statistics, and the combined score."""
    scored = part["scored"]
    z: dict[str, np.ndarray] = {}
    for slot, name in enumerate(NULL_COMPONENTS):
        if name in part["raw"]:
            raw = part["raw"][name]
            ok = _null_valid(part, name, raw)
            median, deviation = nulls[slot]
            z[name] = empirical_null_given(raw, ok, median, deviation)[0]
    if part["bridging"] is not None and "bridging" in wanted:
        z["bridging"] = np.where(scored, np.asarray(part["bridging"], dtype=np.float64), np.nan)
    if "role" in wanted:
        z["role"] = role_shift_zscore_given(
            part["statistic"], part["strata"], part["role_ok"], role_medians, n_roles=n_roles
        )
    z = {name: z[name] for name in COMPONENTS if name in z}
    rows = scored.size
    if z:
        combined, strongest = combine_zscores(np.stack(list(z.values())))
    else:
        combined, strongest = np.full(rows, np.nan), np.full(rows, -1)
    score = np.where(scored & np.isfinite(combined), np.maximum(combined, 0.0), np.nan)
    kept = ("offset", "status", "composition", "magnitude", "error")
    return {
        **{key: part[key] for key in kept},
        "components": z,
        "score": score,
        "strongest": np.where(np.isfinite(score), strongest, -1).astype(np.int8),
    }


def _finite_scores(part: Mapping[str, Any]) -> int:
    return int(np.isfinite(part["score"]).sum())


def _best(part: Mapping[str, Any], quota: int) -> tuple[np.ndarray, np.ndarray]:
    """The part's ``quota`` highest finite scores (ties by row) and their window rows."""
    score = part["score"]
    rows = np.flatnonzero(np.isfinite(score))
    top = rows[np.lexsort((rows, -score[rows]))][:quota]
    return top + part["offset"], score[top]


def _at_least(part: Mapping[str, Any], threshold: float) -> np.ndarray:
    score = part["score"]
    finite = np.isfinite(score)
    return np.flatnonzero(finite & (np.where(finite, score, -np.inf) >= threshold)) + part["offset"]


def _alert_rows(parts: Parts, policy: ShiftPolicy) -> np.ndarray:
    """The alerted accounts' rows, sorted: over the threshold, or the budget's top-k over
    the floor (each part's best ``quota``, then the best ``quota`` of all of them, as
    :func:`rolewatch.engine.scoring.alert_mask` orders them)."""
    if policy.alert_mode == "threshold":
        return np.sort(np.concatenate(parts.ask(_at_least, policy.threshold)))
    quota = budget_quota(sum(parts.ask(_finite_scores)), policy.budget)
    offered = parts.ask(_best, quota)
    rows = np.concatenate([part_rows for part_rows, _ in offered])
    scores = np.concatenate([part_scores for _, part_scores in offered])
    top = np.lexsort((rows, -scores))[:quota]
    return np.sort(rows[top][scores[top] >= policy.floor])


def _outcome(part: Mapping[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    return part["score"], part["status"]


def _details(part: Mapping[str, Any], rows: np.ndarray) -> dict[str, Any]:
    """The detail arrays of the window rows ``rows`` that fall in this part."""
    offset = part["offset"]
    local = rows[(rows >= offset) & (rows < offset + part["score"].size)] - offset
    return {
        "composition": part["composition"][local],
        "magnitude": part["magnitude"][local],
        "error": np.asarray(part["error"], dtype=np.float64)[local],
        "components": {name: values[local] for name, values in part["components"].items()},
        "strongest": part["strongest"][local],
    }


def _window_scores(parts: Parts, alerted: np.ndarray) -> WindowScores:
    """Every account's score and status, and the alerted accounts' details."""
    outcome = parts.ask(_outcome)
    score = np.concatenate([score for score, _ in outcome])
    codes = np.concatenate([status for _, status in outcome])
    details = parts.ask(_details, alerted)
    names = list(details[0]["components"]) if details else []
    components = {
        name: np.concatenate([detail["components"][name] for detail in details]) for name in names
    }
    strongest = np.concatenate([detail["strongest"] for detail in details])
    labels = np.array([*names, ""], dtype=object)
    alert = np.zeros(score.size, dtype=bool)
    alert[alerted] = True
    return WindowScores(
        score=score,
        composition=np.concatenate([detail["composition"] for detail in details]),
        magnitude=np.concatenate([detail["magnitude"] for detail in details]),
        error=np.concatenate([detail["error"] for detail in details]),
        status=status_labels(codes),
        alert=alert,
        bridging=components.get("bridging", np.full(alerted.size, np.nan)),
        components=components,
        strongest=labels[np.where(strongest >= 0, strongest, len(names))],
        detail_rows=alerted,
    )
