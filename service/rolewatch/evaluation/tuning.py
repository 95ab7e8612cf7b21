"""Choosing the scoring defaults by leave-one-scenario-out, from kept scoring inputs.

Every combination of the tunable scoring parameters (:data:`GRID`) is scored on every kept
run (:class:`rolewatch.evaluation.runs.Run`) without recomputing the pipeline. For each
scenario in turn, the combination that does best on the *other* scenarios is chosen and
its figures on the held-out scenario are reported: no default is judged on the data it
was picked on.

"Best" (:func:`choose`): among the combinations that keep the training runs' volume
controls alerted at most :data:`MAX_VOLUME_ALERTED` on average and every season window
within the budget, the highest mean recall over all structural change types and scenarios;
within :data:`RECALL_TIE` of it, the highest mean precision.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from rolewatch.engine.scoring import ShiftPolicy, alert_mask

from .figures import STRUCTURAL, figures
from .runs import Run

__all__ = ["GRID", "MAX_VOLUME_ALERTED", "RECALL_TIE", "Choice", "choose", "grid", "score_grid"]

GRID: dict[str, tuple] = {
    "floor": (3.5, 4.0, 4.5, 5.0, 5.5, 6.0),
    "novelty_windows": (1, 4, 8),
    "tie_smoothing": (1.0, 2.0, 4.0),
}
MAX_VOLUME_ALERTED = 0.05
RECALL_TIE = 0.005


@dataclass(frozen=True)
class Choice:
    """One combination's parameters (the floor kept apart: it needs no new scores)."""

    novelty_windows: int
    tie_smoothing: float
    floor: float

    def policy(self, base: ShiftPolicy) -> ShiftPolicy:
        return replace(
            base,
            novelty_windows=self.novelty_windows,
            tie_smoothing=self.tie_smoothing,
            floor=self.floor,
        )

    def label(self) -> str:
        return (
            f"floor {self.floor:g}, novelty_windows {self.novelty_windows}, "
            f"tie_smoothing {self.tie_smoothing:g}"
        )


def grid(space: Mapping[str, Sequence] = GRID) -> list[Choice]:
    """Every combination of ``space``."""
    return [
        Choice(novelty_windows=int(nw), tie_smoothing=float(ts), floor=float(fl))
        for nw, ts, fl in itertools.product(
            space["novelty_windows"], space["tie_smoothing"], space["floor"]
        )
    ]


def _alerts_for_floors(
    run: Run, policy: ShiftPolicy, floors: Sequence[float]
) -> dict[float, list[set[str]]]:
    """Alerts per window of ``run`` under ``policy`` for every floor, scoring once."""
    out: dict[float, list[set[str]]] = {floor: [] for floor in floors}
    for window in run.windows:
        if window.training or window.inputs is None:
            for floor in floors:
                out[floor].append(set())
            continue
        score = window.inputs.score(policy).score
        for floor in floors:
            mask = alert_mask(score, replace(policy, floor=floor))
            out[floor].append(set(window.nodes[mask].tolist()))
    return out


def score_grid(
    runs: Sequence[Run], base: ShiftPolicy, choices: Sequence[Choice]
) -> dict[Choice, list[dict[str, float]]]:
    """Figures of every run under every choice (one entry per run, in ``runs`` order)."""
    results: dict[Choice, list[dict[str, float]]] = {choice: [] for choice in choices}
    scored = sorted({(c.novelty_windows, c.tie_smoothing) for c in choices})
    for run in runs:
        training = [window.training for window in run.windows]
        for novelty_windows, smoothing in scored:
            floors = sorted(
                {
                    c.floor
                    for c in choices
                    if (c.novelty_windows, c.tie_smoothing) == (novelty_windows, smoothing)
                }
            )
            policy = replace(base, novelty_windows=novelty_windows, tie_smoothing=smoothing)
            for floor, alerts in _alerts_for_floors(run, policy, floors).items():
                choice = Choice(novelty_windows, smoothing, floor)
                results[choice].append(figures(run.truth, run.meta, alerts, run.active(), training))
    return results


def _objective(rows: Sequence[dict[str, float]], budget: float) -> tuple[bool, float, float]:
    """(meets the constraints, mean structural recall, mean precision) over ``rows``."""
    recall = [r.get(f"recall_{c}", np.nan) for r in rows for c in STRUCTURAL]
    precision = [r["precision"] for r in rows]
    volume = [r["control_volume_control"] for r in rows]
    season = [r["season_share"] for r in rows]
    mean_volume = float(np.nanmean(volume)) if np.isfinite(volume).any() else 0.0
    ok = mean_volume <= MAX_VOLUME_ALERTED and bool(
        np.nanmax(season, initial=0.0) <= budget + 1e-12
    )
    return ok, float(np.nanmean(recall)), float(np.nanmean(precision))


def choose(
    results: Mapping[Choice, Sequence[dict[str, float]]],
    use: Sequence[bool],
    budget: float,
) -> Choice:
    """The best choice on the runs flagged in ``use`` (see the module docstring)."""
    scored = []
    for choice, rows in results.items():
        picked = [row for row, keep in zip(rows, use, strict=True) if keep]
        ok, recall, precision = _objective(picked, budget)
        scored.append((ok, recall, precision, choice))
    candidates = [item for item in scored if item[0]] or scored
    best = max(item[1] for item in candidates)
    close = [item for item in candidates if item[1] >= best - RECALL_TIE]
    return max(close, key=lambda item: (item[2], item[3].floor))[3]
