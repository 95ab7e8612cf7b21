"""How long each stage of a window close took.

Every closed window records its stage times (``windows.stage_seconds``), the closer observes
them in a Prometheus histogram per stage, and ``GET /v1/windows`` and ``rolewatch bench
close`` show them, so an operator sees which stage grows with the stream.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager

# The stages of a close, in the order they are shown: read the window's events and the
# known pairs, the snapshot and its ReFeX features, tie cells against the known pairs,
# memberships against the frozen basis, each account's baseline and novelty history (the
# earlier windows read one at a time from the store, folded in as read), communities and the
# bridging z-score, the shift scores, the alerts' evidence, and the write transaction. (A
# close runs the baselines and the bridging z-score before the features, so that it can let
# the tie graph go early, and waits for the communities last. With compute = "dask" the
# cluster computes the features, memberships and tie cells together: their seconds count as
# features, and the ties stage holds only the activity counts.)
STAGES = (
    "load",
    "features",
    "ties",
    "memberships",
    "history",
    "bridging",
    "scoring",
    "evidence",
    "store",
)


class StageClock:
    """Sums wall-clock seconds per stage (a stage may run in several pieces)."""

    def __init__(self) -> None:
        self._seconds: dict[str, float] = {}
        self._running: dict[str, float] = {}

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        """Time the block as part of stage ``name`` (one of :data:`STAGES`)."""
        if name not in STAGES:
            raise ValueError(f"unknown stage {name!r}; use one of {', '.join(STAGES)}")
        started = time.perf_counter()
        self._running[name] = started
        try:
            yield
        finally:
            del self._running[name]
            elapsed = time.perf_counter() - started
            self._seconds[name] = self._seconds.get(name, 0.0) + elapsed

    def seconds(self) -> dict[str, float]:
        """Every stage's seconds to the millisecond (0 for a stage that did not run; a stage
        still running counts its time so far)."""
        now = time.perf_counter()
        return {
            name: round(
                self._seconds.get(name, 0.0) + (now - self._running[name])
                if name in self._running
                else self._seconds.get(name, 0.0),
                3,
            )
            for name in STAGES
        }
