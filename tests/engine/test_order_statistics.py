"""Exact medians of values split over parts, against numpy's median of the values together."""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.engine import order_statistics
from rolewatch.engine.order_statistics import InProcessParts, grouped_medians, part_brackets


def _random_parts(rng, groups: int, kind: str) -> list[dict]:
    parts = []
    for _ in range(int(rng.integers(1, 7))):
        n = int(rng.integers(0, 4000))
        if kind == "normal":
            values = rng.normal(size=n)
        elif kind == "few distinct":  # most values tied: brackets must not gather them all
            values = rng.integers(0, 4, n).astype(float)
        else:
            values = np.round(rng.exponential(size=n), 1)
        parts.append({"v": values, "g": rng.integers(0, groups, n)})
    return parts


@pytest.mark.parametrize("kind", ["normal", "few distinct", "rounded"])
def test_medians_equal_numpys_median_of_the_union(kind):
    # Reference: numpy.median of each group's values gathered in one array, compared to the
    # last bit (the selection picks the same order statistics and averages them as numpy).
    rng = np.random.default_rng(11)
    for _ in range(60):
        groups = int(rng.integers(1, 6))
        parts = _random_parts(rng, groups, kind)
        values = np.concatenate([part["v"] for part in parts])
        labels = np.concatenate([part["g"] for part in parts])
        medians = grouped_medians(InProcessParts(parts), "v", "g", groups)
        for g in range(groups):
            if (labels == g).any():
                assert medians[g] == np.median(values[labels == g])
            else:
                assert np.isnan(medians[g])


def test_one_value_and_two_values_and_an_empty_part():
    parts = [
        {"v": np.array([3.0]), "g": np.array([0])},
        {"v": np.zeros(0), "g": np.zeros(0, dtype=int)},
        {"v": np.array([1.0, 2.0]), "g": np.array([1, 1])},
    ]
    medians = grouped_medians(InProcessParts(parts), "v", "g", 3)
    assert medians[0] == 3.0 and medians[1] == 1.5 and np.isnan(medians[2])


def test_only_a_thin_slice_of_the_values_is_gathered(monkeypatch):
    # The third question brings back the values inside one bracket per wanted rank: about
    # count / PIVOTS a part, not the values themselves (a window's accounts stay where
    # they are).
    monkeypatch.setattr(order_statistics, "PIVOTS", 64)
    rng = np.random.default_rng(3)
    parts = [{"v": rng.normal(size=50_000), "g": np.zeros(50_000, dtype=int)} for _ in range(4)]
    gathered: list[int] = []

    class Counting(InProcessParts):
        def ask(self, function, *args):
            answers = super().ask(function, *args)
            if function is part_brackets:
                gathered.append(sum(v.size for answer in answers for _, v in answer))
            return answers

    medians = grouped_medians(Counting(parts), "v", "g", 1)
    assert medians[0] == np.median(np.concatenate([part["v"] for part in parts]))
    assert gathered and gathered[0] <= 2 * 4 * (50_000 // 64 + 2)
