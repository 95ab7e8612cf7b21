"""A Dask close's shift scores computed on the cluster, over parts of the window's accounts.

The window's score inputs (each account's mixtures, events, tie cells and history, as
:class:`rolewatch.pipeline.compute.ScoreInputs` holds them) are cut into contiguous ranges
of rows and sent to the workers; :func:`rolewatch.engine.scoring_parts.score_over_parts`
then asks the parts for the window's sums and medians, applies them where each part lives,
and picks the alerts by a distributed top-k. This process receives every account's score
and status (8 and 1 bytes an account) and the details of the alerted accounts, not the
component z-scores and temporaries of every account.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from rolewatch.engine.scoring import ShiftPolicy, WindowScores
from rolewatch.engine.scoring_parts import score_over_parts, split_score_inputs
from rolewatch.scale.partitions import Partitioned

__all__ = ["ClusterParts", "score_on_cluster"]


class ClusterParts:
    """:class:`rolewatch.engine.order_statistics.Parts` living on a Dask cluster, one future
    a part. Each :meth:`map` replaces the parts, and the futures of the parts replaced are
    let go, so a worker holds one round's columns of a part at a time (Dask counts a value
    once per key: the rounds' mappings share most arrays, and several held at once would
    be counted several times over and spilled). ``live`` holds the current futures, so a
    failed computation can free them at once."""

    def __init__(self, partitioned: Partitioned, live: list[Any]) -> None:
        self.partitioned = partitioned
        self.live = live
        live[:] = partitioned.futures

    def map(self, function: Callable[..., Any], *args: Any) -> ClusterParts:
        return ClusterParts(self.partitioned.map(function, *args), self.live)

    def ask(self, function: Callable[..., Any], *args: Any) -> list[Any]:
        return self.partitioned.map(function, *args).gather()


def score_on_cluster(
    client: Any, inputs: Any, policy: ShiftPolicy, partitions: int
) -> WindowScores:
    """``inputs.score(policy)`` computed on the cluster in ``partitions`` parts of about
    equal rows (``inputs``: :class:`rolewatch.pipeline.compute.ScoreInputs` of a policy
    whose calibration is ``"evidence"``); the alerted accounts' details only
    (``WindowScores.detail_rows``)."""
    n = int(inputs.mixture.shape[0])
    bounds = np.unique(np.linspace(0, n, max(1, min(partitions, n)) + 1).astype(np.int64))
    pieces = split_score_inputs(
        bounds,
        inputs.mixture,
        inputs.baseline,
        inputs.events,
        inputs.baseline_events,
        inputs.error,
        inputs.ties,
        bridging=inputs.bridging,
        structured=inputs.structured,
    )
    live: list[Any] = []
    try:
        # no name here holds the scattered parts: they go once the first round has them
        return score_over_parts(_scattered(client, pieces, bounds, live), policy, inputs.F)
    finally:
        client.cancel(list(live))  # the parts leave the workers once the scores are here


def _scattered(client: Any, pieces: list, bounds: np.ndarray, live: list[Any]) -> ClusterParts:
    """The parts sent to the workers, one future each."""
    return ClusterParts(Partitioned(client, tuple(client.scatter(pieces)), bounds), live)
