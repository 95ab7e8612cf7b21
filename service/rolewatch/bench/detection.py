"""Detection benchmark: every scenario through the service's own pipeline, defaults chosen
leave-one-scenario-out, beside the three baselines at the same budget.

``rolewatch bench detection`` prints one JSON object per scenario with ``case``, ``cores``,
``seconds`` (the whole run), the choice tuned on the other scenarios, its held-out figures
(mean, std, min, max over seeds) and the baselines' figures with as many alerts per window.
See :mod:`rolewatch.evaluation.figures` for how each figure is counted and
``rolewatch evaluate`` for the tables and the real network.

Cases
-----
``detection``
    Seeds 0, 1, 2 of every scenario (3,000 members, 16 weekly windows). With ``--quick``:
    seed 7, 400 members, 10 weeks (reported as ``detection-small``).
"""

from __future__ import annotations

import os
import time
from collections.abc import Iterator
from typing import TypedDict

CASES = ("detection",)


class Size(TypedDict):
    seeds: tuple[int, ...]
    members: int
    weeks: int


SIZES: dict[str, Size] = {
    "detection": {"seeds": (0, 1, 2), "members": 3000, "weeks": 16},
    "detection-small": {"seeds": (7,), "members": 400, "weeks": 10},
}
TARGETS = {
    "recall_takeover": 0.95,
    "recall_contact_point": 0.95,
    "recall_bridge": 0.6,
    "alert_share_max": 0.01,
    "control_volume_control": 0.05,
}


def _met(summary: dict, key: str, goal: float) -> bool | None:
    stats = summary.get(key, {})
    if stats.get("mean") is None:
        return None
    if key.startswith("recall"):
        return bool(stats["mean"] >= goal)
    return bool(stats["max" if key == "alert_share_max" else "mean"] <= goal)


def run(case: str, quick: bool = False) -> Iterator[dict]:
    """Yield one record per scenario for ``case`` (``quick`` runs the small size)."""
    from rolewatch.config import load_settings
    from rolewatch.evaluation.benchmark import evaluate
    from rolewatch.scenario import SCENARIOS

    if case not in CASES:
        raise ValueError(f"unknown detection case {case!r}; choose one of {CASES}")
    name = "detection-small" if quick else case
    size = SIZES[name]
    settings = load_settings()
    started = time.perf_counter()
    report = evaluate(
        settings,
        scenarios=list(SCENARIOS),
        seeds=size["seeds"],
        members=size["members"],
        weeks=size["weeks"],
    )
    seconds = time.perf_counter() - started
    for scenario, held in report["held_out"].items():
        summary = held["role_shift"]["summary"]
        yield {
            "case": name,
            "scenario": scenario,
            "cores": os.cpu_count(),
            "seconds": round(seconds, 2),
            **{key: list(v) if isinstance(v, tuple) else v for key, v in size.items()},
            "choice": held["choice"],
            "targets": TARGETS,
            "met": {key: _met(summary, key, goal) for key, goal in TARGETS.items()},
            "role_shift": summary,
            "baselines_matched": {
                key: modes.get("matched", {}) for key, modes in held["baselines"].items()
            },
        }
