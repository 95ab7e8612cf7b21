"""Detection benchmark: the marketplace scenario through the service's own pipeline.

``rolewatch bench detection`` prints one JSON object per case with ``case``, ``cores``,
``seconds``, the settings that matter and the summary figures (mean, std, min, max over
seeds) of the role-shift detector and of the volume baseline at the same alert budget.
See :mod:`rolewatch.scenario.evaluate` for how each figure is counted.

Cases
-----
``detection``
    Seeds 0, 1, 2 of the default scenario (3,000 members, 16 weekly windows). With
    ``--quick``: seed 7, 400 members, 10 weeks (the committed sample's parameters), for
    a smoke run (reported as ``detection-small``).
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
TARGETS = {"recall_structural": 0.9, "alert_share_max": 0.01, "volume_control_fa": 0.05}
SETTINGS_SHOWN = (
    "shift_measure",
    "shift_baseline",
    "alert_mode",
    "alert_threshold",
    "alert_budget",
    "alert_floor",
    "min_events",
    "binning",
    "training_windows",
    "roles",
)


def run(case: str, quick: bool = False) -> Iterator[dict]:
    """Yield one record for ``case`` (``detection``; ``quick`` runs the small size)."""
    from rolewatch.config import load_settings
    from rolewatch.scenario.evaluate import evaluate

    if case not in CASES:
        raise ValueError(f"unknown detection case {case!r}; choose one of {CASES}")
    size = SIZES["detection-small" if quick else case]
    if quick:
        case = "detection-small"
    settings = load_settings()
    started = time.perf_counter()
    report = evaluate(settings, seeds=size["seeds"], members=size["members"], weeks=size["weeks"])
    seconds = time.perf_counter() - started
    role = report["role_shift"]["summary"]
    yield {
        "case": case,
        "cores": os.cpu_count(),
        "seconds": round(seconds, 2),
        **{key: list(value) if isinstance(value, tuple) else value for key, value in size.items()},
        "settings": {name: getattr(settings, name) for name in SETTINGS_SHOWN},
        "targets": TARGETS,
        "met": {
            key: (
                role[key]["mean"] is not None
                and (
                    role[key]["mean"] >= goal
                    if key.startswith("recall")
                    else role[key]["max" if key == "alert_share_max" else "mean"] <= goal
                )
            )
            for key, goal in TARGETS.items()
        },
        "role_shift": role,
        "volume_baseline": report["volume_baseline"]["summary"],
    }
