"""Role profiles over the readable measures, and names and descriptions that tell roles apart.

The RolX sense-making step (Henderson et al., "RolX: structural role extraction & mining in
large graphs", KDD 2012) explains each role through familiar node measures. Here a role is
read off the accounts that hold it as their dominant role in the reference windows: for every
readable measure (:mod:`rolewatch.engine.readable`) the role's average beside the
population's, and the role's *level*, the mean population percentile of its holders minus
one half (``-0.5`` to ``+0.5``; 0 is the population's middle). Percentiles put counts and
shares on one scale, so "high" and "low" mean the same for every measure.

A name says the activity level, the direction of flow and the measures on which the role
stands out, adding measures until no two roles share a name. A description gives the
average account's figures on the role's most distinctive measures, each beside the
population's; a measure is written into at most half of the descriptions (the roles most
extreme on it), so no sentence repeats across most of the catalogue.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.stats import rankdata

from .errors import EngineInputError
from .readable import MEASURES, SHARE_MEASURES

__all__ = ["RoleProfile", "describe_roles", "format_value"]


@dataclass(frozen=True)
class RoleProfile:
    """What a role looks like in readable measures.

    Attributes
    ----------
    role_id : int
    name : str
        Default name, unique within the basis without numeric suffixes (renameable).
    description : str
        What the typical account in the role does, with figures.
    holders : int
        Reference-window accounts whose dominant role it is.
    mean, population, level : dict
        Per measure: the holders' average, the population's average and the role's level
        (mean population percentile of the holders minus 0.5).
    """

    role_id: int
    name: str
    description: str
    holders: int
    mean: dict[str, float]
    population: dict[str, float]
    level: dict[str, float]


_CLUSTERING, _BROKERAGE = MEASURES.index("clustering"), MEASURES.index("brokerage")
#: Level (mean percentile minus one half) from which a measure reads as high or low.
NOTABLE = 0.1

# name words: activity from the level of events sent and received
_ACTIVITY = ((0.25, "very busy"), (0.1, "busy"), (-0.1, "steady"), (-0.25, "occasional"))
_QUIET = "quiet"
# measure -> (phrase when high, phrase when low), our own words; the volume of events is in
# the activity word already
_TRAITS: dict[str, tuple[str, str | None]] = {
    "out_degree": ("many recipients", "few recipients"),
    "in_degree": ("many sources", "few sources"),
    "reciprocity": ("two-way ties", "one-way ties"),
    "clustering": ("close-knit contacts", "unconnected contacts"),
    "brokerage": ("links separate groups", None),  # low brokerage mostly means few contacts
    "new_share": ("mostly new counterparts", "repeat counterparts"),
}
#: Trait phrases a name carries at most before roles still alike are compared directly.
NAME_TRAITS = 2
# what roles still alike are compared on ("more recipients")
_SHORT = {
    "events_out": "sending",
    "events_in": "receiving",
    "out_degree": "recipients",
    "in_degree": "sources",
    "sent_share": "sent share",
    "reciprocity": "two-way ties",
    "clustering": "clustering",
    "brokerage": "brokerage",
    "new_share": "new counterparts",
}
# measure -> clause with the role's average {r} and the population's {p}; no two templates
# share three words in a row (tests/engine/test_naming.py checks the descriptions)
_CLAUSES = {
    "events_out": "sends {r} events a window (all accounts: {p})",
    "events_in": "receives {r} events, against {p} overall",
    "out_degree": "writes to {r} distinct accounts where others write to {p}",
    "in_degree": "hears from {r} accounts, compared with {p} for everyone",
    "sent_share": "{r} of its traffic is outgoing (population {p})",
    "reciprocity": "{r} of its ties run both ways, versus {p} generally",
    "clustering": "{r} of its contact pairs deal with each other too; usual is {p}",
    "brokerage": "has {r} contacts who do not know one another, the rest {p}",
    "new_share": "{r} of its counterparts are new (average account {p})",
}


def format_value(measure: str, value: float) -> str:
    """A measure's value as shown: shares in percent, counts whole or with one decimal."""
    if not np.isfinite(value):
        return "–"
    if measure in SHARE_MEASURES:
        return f"{value:.0%}"
    if abs(value - round(value)) < 0.05 or abs(value) >= 100:
        return f"{value:,.0f}"
    return f"{value:,.1f}"


def _percentiles(X: np.ndarray) -> np.ndarray:
    """Population percentile of every value per column, ties averaged, NaN kept."""
    P = np.full_like(X, np.nan)
    for j in range(X.shape[1]):
        ok = np.isfinite(X[:, j])
        if ok.any():
            P[ok, j] = (rankdata(X[ok, j]) - 0.5) / int(ok.sum())
    return P


def _holders(mix: np.ndarray, r: int) -> np.ndarray:
    """Rows whose dominant role is ``r``; else the rows with most of ``r`` (1 %, at least 5)."""
    held = np.flatnonzero(mix.argmax(axis=1) == r)
    if len(held):
        return held
    top = max(5, len(mix) // 100)
    return np.argsort(-mix[:, r], kind="stable")[:top]


def _nan_stat(values: np.ndarray, stat) -> float:
    finite = values[np.isfinite(values)]
    return float(stat(finite)) if len(finite) else float("nan")


def describe_roles(
    role_ids: Sequence[int], mixture: np.ndarray, measures: np.ndarray
) -> list[RoleProfile]:
    """Profile, name and describe every role from the readable measures of its holders.

    Parameters
    ----------
    role_ids : sequence of int, length k
    mixture : ndarray, shape (n, k)
        Role mixtures of the reference accounts (rows with NaN, too little activity, are
        left out).
    measures : ndarray, shape (n, len(MEASURES))
        :func:`rolewatch.engine.readable.readable_measures` of the same accounts, same
        rows; NaN where a measure is unknown (e.g. ``new_share`` in the first window).

    Returns
    -------
    list of RoleProfile, in ``role_ids`` order
    """
    mix = np.asarray(mixture, dtype=np.float64)
    X = np.asarray(measures, dtype=np.float64)
    k = len(role_ids)
    if mix.ndim != 2 or mix.shape[1] != k:
        raise EngineInputError(f"mixture must be an n x {k} array, got shape {mix.shape}")
    if X.shape != (mix.shape[0], len(MEASURES)):
        raise EngineInputError(
            f"measures must be {mix.shape[0]} x {len(MEASURES)} (one row per mixture row, one "
            f"column per readable measure), got {X.shape}"
        )
    ok = np.isfinite(mix).all(axis=1)
    mix, X = mix[ok], X[ok].copy()
    # clustering needs two counterparts; with one or none (exactly the rows with clustering
    # 0 and brokerage d - 2t/d at most 1) it is left out rather than read as "unconnected"
    few = (X[:, _CLUSTERING] == 0) & (X[:, _BROKERAGE] <= 1)
    X[few, _CLUSTERING] = np.nan
    if not len(mix):
        raise EngineInputError("no account with a role mixture: describe roles on active windows")
    activity = X[:, [0]] + X[:, [1]]
    P = _percentiles(np.hstack([X, activity]))
    holders = [_holders(mix, r) for r in range(k)]
    level = np.array([[_nan_stat(P[h, j], np.mean) for j in range(P.shape[1])] for h in holders])
    level -= 0.5
    mean = np.array([[_nan_stat(X[h, j], np.mean) for j in range(X.shape[1])] for h in holders])
    population = np.array([_nan_stat(X[:, j], np.mean) for j in range(X.shape[1])])
    names = _unique_names([_name_parts(level[r], mean[r]) for r in range(k)], level)
    clauses = _assign_clauses(level[:, : len(MEASURES)])
    return [
        RoleProfile(
            role_id=int(role_ids[r]),
            name=names[r],
            description=_description(clauses[r], mean[r], population),
            holders=int(len(holders[r]) if (mix.argmax(axis=1) == r).any() else 0),
            mean=_by_name(mean[r]),
            population=_by_name(population),
            level=_by_name(level[r, : len(MEASURES)]),
        )
        for r in range(k)
    ]


def _by_name(row: np.ndarray) -> dict[str, float]:
    return {name: round(float(v), 4) for name, v in zip(MEASURES, row, strict=True)}


# --- names ---------------------------------------------------------------------------------


def _name_parts(level_row: np.ndarray, mean_row: np.ndarray) -> list[str]:
    """Head ("busy sender") then the trait phrases, most distinctive first."""
    active = float(level_row[len(MEASURES)])
    word = next((w for floor, w in _ACTIVITY if np.isfinite(active) and active >= floor), _QUIET)
    share = float(mean_row[MEASURES.index("sent_share")])
    noun = "sender" if share >= 0.7 else "receiver" if share <= 0.3 else "two-way account"
    traits = []
    for j in np.argsort(-np.abs(np.nan_to_num(level_row[: len(MEASURES)])), kind="stable"):
        measure = MEASURES[int(j)]
        value = float(level_row[int(j)])
        if measure in _TRAITS and np.isfinite(value) and abs(value) >= NOTABLE / 2:
            phrase = _TRAITS[measure][0 if value > 0 else 1]
            if phrase:
                traits.append(phrase)
    return [f"{word} {noun}", *traits[:NAME_TRAITS]]


def _unique_names(parts: list[list[str]], level: np.ndarray) -> list[str]:
    """Head plus the strongest trait, then one trait more where names collide; roles still
    alike are compared on the measure on which they differ most ("less/more recipients")."""
    used = [min(2, len(p)) for p in parts]
    names = [", ".join(p[:u]) for p, u in zip(parts, used, strict=True)]
    for _ in range(max(len(p) for p in parts)):
        for r in _clashes(names):
            used[r] = min(used[r] + 1, len(parts[r]))
        names = [", ".join(p[:u]) for p, u in zip(parts, used, strict=True)]
    for _ in range(len(names)):
        groups = _groups(names)
        if not groups:
            break
        for group in groups:
            _compare(names, group, level)
    return names


def _compare(names: list[str], group: list[int], level: np.ndarray) -> None:
    """Tell the roles of ``group`` (same name) apart by the measure that spreads them most."""
    spread = np.nan_to_num(np.ptp(level[np.ix_(group, range(len(MEASURES)))], axis=0))
    j = int(np.argmax(spread))
    order = sorted(group, key=lambda r: level[r, j])
    plural = _SHORT[MEASURES[j]].endswith("s")
    if len(order) == 2:
        words = ["fewer" if plural else "less", "more"]
    else:
        words = ["fewest" if plural else "least", "most"]
    for rank, r in enumerate(order):
        word = words[0] if rank == 0 else words[1] if rank == len(order) - 1 else "middling"
        names[r] = f"{names[r]}, {word} {_SHORT[MEASURES[j]]}"


def _groups(names: list[str]) -> list[list[int]]:
    seen: dict[str, list[int]] = {}
    for r, name in enumerate(names):
        seen.setdefault(name, []).append(r)
    return [rows for rows in seen.values() if len(rows) > 1]


def _clashes(names: list[str]) -> list[int]:
    return [r for group in _groups(names) for r in group]


# --- descriptions --------------------------------------------------------------------------


def _assign_clauses(level: np.ndarray, most: int = 3, fewest: int = 2) -> list[list[int]]:
    """Measures each description speaks of: the role's most distinctive ones, each measure
    in at most half of the descriptions (those most extreme on it)."""
    k, m = level.shape
    cap = max(1, k // 2)
    strength = np.nan_to_num(np.abs(level), nan=-1.0)
    chosen: list[list[int]] = [[] for _ in range(k)]
    used = np.zeros(m, dtype=int)
    order = np.argsort(-strength, axis=None, kind="stable")
    for wanted, floor in ((most, NOTABLE), (fewest, 0.0)):
        for flat in order:
            r, j = divmod(int(flat), m)
            if strength[r, j] < floor or len(chosen[r]) >= wanted or used[j] >= cap:
                continue
            if j not in chosen[r]:
                chosen[r].append(j)
                used[j] += 1
    return [sorted(c, key=lambda j: -float(strength[r, j])) for r, c in enumerate(chosen)]  # noqa: B023


def _description(clauses: list[int], mean: np.ndarray, population: np.ndarray) -> str:
    parts = [
        _CLAUSES[MEASURES[j]].format(
            r=format_value(MEASURES[j], float(mean[j])),
            p=format_value(MEASURES[j], float(population[j])),
        )
        for j in clauses
    ]
    if not parts:
        return "Matches the population on every readable measure."
    text = "; ".join(parts)
    return text[0].upper() + text[1:] + "."
