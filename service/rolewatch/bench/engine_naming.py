"""Benchmark of the role-naming step of training: readable measures and role descriptions.

``naming-1m``: one power-law window of 1,000,000 events (the ``features-1m`` generator)
gets its readable measures (:func:`rolewatch.engine.readable.readable_measures`, triangles
included), then eight roles are profiled, named and described over random mixtures
(:func:`rolewatch.engine.naming.describe_roles`; the cost does not depend on what the
mixtures hold). ``--quick`` uses 200,000 events. ``rolewatch bench naming-1m`` calls
:func:`run`.
"""

from __future__ import annotations

import os
import resource
import time
from collections.abc import Iterator

import numpy as np

CASES = ("naming-1m",)
ROLES = 8


def run(case: str, *, quick: bool = False) -> Iterator[dict]:
    """Yield one result dict for ``case``."""
    if case not in CASES:
        raise ValueError(f"unknown naming bench case {case!r}; choose one of {', '.join(CASES)}")
    from rolewatch.bench.engine_features import _snapshot
    from rolewatch.engine.naming import describe_roles
    from rolewatch.engine.readable import readable_measures

    events, accounts = (200_000, 40_000) if quick else (1_000_000, 200_000)
    snapshot, _ = _snapshot(events, accounts, seed=0)
    new = np.zeros(snapshot.n_nodes)
    mixture = np.random.default_rng(0).dirichlet(np.full(ROLES, 0.3), size=snapshot.n_nodes)
    started = time.perf_counter()
    measures = readable_measures(snapshot.counts, new_counterparts=new)
    measured = time.perf_counter()
    describe_roles(tuple(range(ROLES)), mixture, measures.values)
    done = time.perf_counter()
    yield {
        "case": case,
        "cores": os.cpu_count(),
        "events": events,
        "accounts": int(snapshot.n_nodes),
        "roles": ROLES,
        "measures_seconds": round(measured - started, 3),
        "describe_seconds": round(done - measured, 3),
        "naming_seconds": round(done - started, 3),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0, 1),
    }
