"""Exact medians of values split over parts, found by asking each part three small questions.

A window's accounts may live on several workers, and the shift score's calibration needs
exact medians of per-account values, one per group (an activity stratum, a component).
Gathering every value into one process is what splitting the accounts avoids. Instead each
part is asked, in turn:

1. :func:`part_pivots`: how many values each group holds, and the values at evenly spaced
   ranks of its own sorted values (at most ``PIVOTS + 1`` a group);
2. :func:`part_counts_below`: how many of its values lie below each pivot of every part;
   the summed counts put every wanted rank between two adjacent pivots;
3. :func:`part_brackets`: how many of its values equal each bracket's lower end, and the
   values strictly inside the bracket (at most about ``count / PIVOTS`` a part).

The wanted order statistic is then picked from the thin slice gathered, so the result is
the same number ``numpy.median`` gives on all the values together. This is the usual
pivot-and-count form of distributed selection (common practice, no source).

A part is a mapping holding the values and their group numbers under keys the caller
names; how a question reaches the parts (in this process, or to workers of a cluster) is
the caller's :class:`Parts`. Pure: arrays in, arrays out.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any, Protocol

import numpy as np

__all__ = [
    "PIVOTS",
    "InProcessParts",
    "Parts",
    "grouped_medians",
    "part_brackets",
    "part_counts_below",
    "part_pivots",
]

# Pivots a part sends per group: each bracket then holds about 1/PIVOTS of a part's values
# of the group (common practice, no source).
PIVOTS = 256


class Parts(Protocol):
    """Parts of a window's accounts, each a mapping of per-account arrays, wherever they
    live. ``map`` replaces every part by ``function(part, *args)`` where the part lives;
    ``ask`` brings ``function(part, *args)`` of every part here, in part order (small
    answers only)."""

    def map(self, function: Callable[..., Any], *args: Any) -> Parts: ...

    def ask(self, function: Callable[..., Any], *args: Any) -> list[Any]: ...


class InProcessParts:
    """:class:`Parts` held in this process (a list of mappings)."""

    def __init__(self, parts: Sequence[Mapping[str, Any]]) -> None:
        self.parts = list(parts)

    def map(self, function: Callable[..., Any], *args: Any) -> InProcessParts:
        return InProcessParts([function(part, *args) for part in self.parts])

    def ask(self, function: Callable[..., Any], *args: Any) -> list[Any]:
        return [function(part, *args) for part in self.parts]


def _sorted_groups(
    part: Mapping[str, Any], values_key: str, groups_key: str, n_groups: int
) -> tuple[np.ndarray, np.ndarray]:
    """The part's values sorted by group, then value, and where each group starts
    (``starts[g]`` to ``starts[g + 1]``)."""
    values = np.asarray(part[values_key], dtype=np.float64)
    groups = np.asarray(part[groups_key], dtype=np.int64)
    order = np.lexsort((values, groups))
    starts = np.searchsorted(groups[order], np.arange(n_groups + 1))
    return values[order], starts


def part_pivots(
    part: Mapping[str, Any], values_key: str, groups_key: str, n_groups: int
) -> tuple[np.ndarray, list[np.ndarray]]:
    """Question 1: the part's count of values per group, and per group its values at
    evenly spaced ranks, its smallest and largest included."""
    values, starts = _sorted_groups(part, values_key, groups_key, n_groups)
    counts = np.diff(starts)
    pivots = []
    for g in range(n_groups):
        held = values[starts[g] : starts[g + 1]]
        ranks = np.unique(np.linspace(0, held.size - 1, min(held.size, PIVOTS + 1)).astype(int))
        pivots.append(held[ranks])
    return counts.astype(np.int64), pivots


def part_counts_below(
    part: Mapping[str, Any],
    values_key: str,
    groups_key: str,
    candidates: Sequence[np.ndarray],
) -> list[np.ndarray]:
    """Question 2: per group, how many of the part's values lie below each candidate."""
    values, starts = _sorted_groups(part, values_key, groups_key, len(candidates))
    return [
        np.searchsorted(values[starts[g] : starts[g + 1]], cuts, side="left")
        for g, cuts in enumerate(candidates)
    ]


def part_brackets(
    part: Mapping[str, Any],
    values_key: str,
    groups_key: str,
    n_groups: int,
    brackets: Sequence[tuple[int, float, float]],
) -> list[tuple[int, np.ndarray]]:
    """Question 3: per bracket ``(group, low, high)``, how many of the part's values of the
    group equal ``low``, and its values strictly between ``low`` and ``high``."""
    values, starts = _sorted_groups(part, values_key, groups_key, n_groups)
    answers = []
    for g, low, high in brackets:
        held = values[starts[g] : starts[g + 1]]
        first, before_high = np.searchsorted(held, [low, high], side="left")
        after_low = np.searchsorted(held, low, side="right")
        answers.append((int(after_low - first), held[after_low:before_high].copy()))
    return answers


def grouped_medians(parts: Parts, values_key: str, groups_key: str, n_groups: int) -> np.ndarray:
    """The median of every group's values over all parts (NaN for a group without values),
    equal to ``numpy.median`` of the group's values taken together.

    Parameters
    ----------
    parts : Parts
        Each part holds finite float64 values under ``values_key`` and their groups
        (``0 <= group < n_groups``) under ``groups_key``.

    Returns
    -------
    ndarray, shape (n_groups,)
    """
    answers = parts.ask(part_pivots, values_key, groups_key, n_groups)
    counts = np.zeros(n_groups, dtype=np.int64)
    for part_counts, _ in answers:
        counts += part_counts
    candidates = [
        np.unique(np.concatenate([pivots[g] for _, pivots in answers])) for g in range(n_groups)
    ]
    below = parts.ask(part_counts_below, values_key, groups_key, candidates)
    total_below = [np.sum([b[g] for b in below], axis=0) for g in range(n_groups)]
    wanted = [
        (g, rank)
        for g in range(n_groups)
        if counts[g] > 0
        for rank in sorted({(int(counts[g]) - 1) // 2, int(counts[g]) // 2})
    ]
    brackets, offsets = [], []
    for g, rank in wanted:
        # the last candidate with at most `rank` values below it: the wanted value is at or
        # above it and below the next candidate
        at = int(np.searchsorted(total_below[g], rank, side="right")) - 1
        high = candidates[g][at + 1] if at + 1 < candidates[g].size else np.inf
        brackets.append((g, float(candidates[g][at]), float(high)))
        offsets.append(rank - int(total_below[g][at]))
    inside = parts.ask(part_brackets, values_key, groups_key, n_groups, brackets)
    picked: dict[tuple[int, int], float] = {}
    for i, ((g, rank), (_, low, _high), offset) in enumerate(
        zip(wanted, brackets, offsets, strict=True)
    ):
        equal = sum(answer[i][0] for answer in inside)
        if offset < equal:
            picked[(g, rank)] = low
        else:
            between = np.sort(np.concatenate([answer[i][1] for answer in inside]))
            picked[(g, rank)] = float(between[offset - equal])
    medians = np.full(n_groups, np.nan)
    for g in range(n_groups):
        if counts[g] > 0:
            middle = [picked[(g, (int(counts[g]) - 1) // 2)], picked[(g, int(counts[g]) // 2)]]
            medians[g] = np.mean(np.array(middle)) if middle[0] != middle[1] else middle[0]
    return medians
