"""Benchmarks of the ReFeX feature engine (snapshot building, discovery, transform).

Each case yields one JSON-serialisable dict with ``case``, ``cores``, timings in seconds,
``peak_rss_mb`` and the sizes involved. Heavy cases run in a child process so the peak
resident memory reported is that case's own. ``rolewatch bench engine`` calls :func:`run`.

Cases: ``features-1m``, ``features-10m``, ``oracle-ratio``, ``triangles-vs-igraph``.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import numpy as np

CASES = ("features-1m", "features-10m", "oracle-ratio", "triangles-vs-igraph")
TARGETS = {
    "features-1m": {"seconds": 5.0, "peak_rss_mb": 2048},
    "features-10m": {"seconds": 90.0, "peak_rss_mb": 16384},
    "oracle-ratio": {"ratio_min": 50.0},
    "triangles-vs-igraph": {"ratio_max": 3.0},
}


def power_law_window(n_edges: int, n_nodes: int, *, exponent: float = 2.1, seed: int = 0):
    """Endpoints of a Chung–Lu style directed graph with power-law expected degrees.

    Each event picks its actor and target independently with probability proportional
    to Zipf-like node weights ``(i + 1) ** (-1 / (exponent - 1))`` (separately permuted for
    out and in), so degrees follow a power law with the given exponent; self-loops are
    re-drawn away by shifting the target. Returns ``(actor_idx, target_idx, weight)``.
    """
    rng = np.random.default_rng(seed)
    ranks = np.arange(1, n_nodes + 1, dtype=np.float64) ** (-1.0 / (exponent - 1.0))
    cdf_out = np.cumsum(ranks[rng.permutation(n_nodes)])
    cdf_in = np.cumsum(ranks[rng.permutation(n_nodes)])
    cdf_out /= cdf_out[-1]
    cdf_in /= cdf_in[-1]
    actor = np.searchsorted(cdf_out, rng.random(n_edges)).astype(np.int32)
    target = np.searchsorted(cdf_in, rng.random(n_edges)).astype(np.int32)
    loop = actor == target
    target[loop] = (target[loop] + 1) % n_nodes
    weight = rng.lognormal(3.0, 1.0, n_edges)
    return actor, target, weight


def _ids(n_nodes: int) -> np.ndarray:
    width = len(str(n_nodes))
    return np.char.add("m", np.char.zfill(np.arange(n_nodes).astype(str), width))


def _snapshot(n_edges: int, n_nodes: int, seed: int = 0):
    from rolewatch.engine.snapshot import Snapshot

    actor, target, weight = power_law_window(n_edges, n_nodes, seed=seed)
    ids = _ids(n_nodes)
    a, t = ids[actor], ids[target]
    t0 = time.perf_counter()
    snap = Snapshot.from_events(a, t, weight)
    return snap, time.perf_counter() - t0


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _base(case: str) -> dict:
    return {"case": case, "cores": os.cpu_count()}


BENCH_TOLERANCE = float(os.environ.get("ROLEWATCH_BENCH_TOLERANCE", "1"))
BENCH_TOLERANCE_STEP = float(os.environ.get("ROLEWATCH_BENCH_TOLERANCE_STEP", "1"))
"""Pruning tolerance ``s`` of the base round and its rise per recursive round: the
library's and the service's defaults. With ``s = 0`` in every round a 3-round recipe keeps
thousands of features on a power-law window (six aggregates per kept feature and round,
few exact agreements); the values used are printed with every result."""


def features_case(
    case: str, n_edges: int, n_nodes: int, max_rounds: int = 3, tolerance: float | None = None
) -> dict:
    """Snapshot build, ReFeX discovery and transform on one power-law window.

    ``seconds`` is the transform (the per-window cost once a recipe is frozen);
    discovery and snapshot building are reported beside it.
    """
    tolerance = BENCH_TOLERANCE if tolerance is None else tolerance
    from rolewatch.engine.features import FeatureRecipe

    snap, snap_s = _snapshot(n_edges, n_nodes)
    t0 = time.perf_counter()
    recipe = FeatureRecipe.discover(
        [snap], max_rounds=max_rounds, tolerance=tolerance, tolerance_step=BENCH_TOLERANCE_STEP
    )
    discover_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    table = recipe.transform(snap)
    transform_s = time.perf_counter() - t0
    out = _base(case)
    out.update(
        {
            "seconds": round(transform_s, 3),
            "transform_seconds": round(transform_s, 3),
            "discover_seconds": round(discover_s, 3),
            "snapshot_seconds": round(snap_s, 3),
            "peak_rss_mb": round(_peak_rss_mb(), 1),
            "events": n_edges,
            "nodes": snap.n_nodes,
            "edges": snap.n_edges,
            "rounds": recipe.reference.get("rounds"),
            "tolerance": tolerance,
            "tolerance_step": BENCH_TOLERANCE_STEP,
            "bin_fraction": recipe.bin_fraction,
            "features": len(recipe.names),
            "table_shape": list(table.raw.shape),
            "target": TARGETS.get(case, {}),
        }
    )
    return out


def oracle_ratio_case(n_edges: int = 50_000, n_nodes: int = 10_000) -> dict:
    """Speed of the sparse base/egonet features vs the per-node networkx reference."""
    sys.path.insert(0, str(Path(__file__).resolve().parents[3] / "tests" / "reference"))
    import nx_oracle  # noqa: E402  (tests/reference, needs networkx)

    from rolewatch.engine.features import BASE_FEATURES
    from rolewatch.engine.features.graph import SnapshotGraph

    snap, _ = _snapshot(n_edges, n_nodes, seed=1)
    t0 = time.perf_counter()
    g = SnapshotGraph(snap)
    ours = np.column_stack([g.base(name) for name in BASE_FEATURES])
    ours_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    ref = nx_oracle.base_features(nx_oracle.snapshot_to_digraph(snap))
    oracle_s = time.perf_counter() - t0
    theirs = np.column_stack([ref[name] for name in BASE_FEATURES])
    out = _base("oracle-ratio")
    out.update(
        {
            "seconds": round(ours_s, 4),
            "oracle_seconds": round(oracle_s, 3),
            "ratio": round(oracle_s / max(ours_s, 1e-9), 1),
            "agree": bool(np.allclose(ours, theirs)),
            "nodes": snap.n_nodes,
            "edges": snap.n_edges,
            "peak_rss_mb": round(_peak_rss_mb(), 1),
            "target": TARGETS["oracle-ratio"],
        }
    )
    print(
        f"oracle-ratio: sparse {ours_s:.3f}s, networkx {oracle_s:.1f}s, ratio {out['ratio']}x",
        file=sys.stderr,
    )
    return out


def triangles_vs_igraph_case(n_edges: int = 1_000_000, n_nodes: int = 200_000) -> dict:
    """Per-node triangle counts: the ReFeX egonet kernel vs igraph on the same graph."""
    out = _base("triangles-vs-igraph")
    try:
        import igraph
    except ImportError:
        out.update(
            {"skipped": "igraph is not installed (optional bench dependency: pip install igraph)"}
        )
        return out
    from rolewatch.engine.features.triangles import binary_pattern, triangle_counts

    snap, _ = _snapshot(n_edges, n_nodes)
    A = binary_pattern(snap.counts)
    t0 = time.perf_counter()
    S = binary_pattern(A + A.T)
    S.sort_indices()
    ours, _ = triangle_counts(S, None)
    ours_s = time.perf_counter() - t0
    upper = S.tocoo()
    keep = upper.row < upper.col
    edges = np.column_stack([upper.row[keep], upper.col[keep]])
    graph = igraph.Graph(n=snap.n_nodes, edges=edges, directed=False)
    t0 = time.perf_counter()
    # local transitivity = triangles / (d choose 2), igraph's per-vertex triangle measure
    trans = np.asarray(graph.transitivity_local_undirected(mode="zero"), dtype=np.float64)
    igraph_s = time.perf_counter() - t0
    deg = np.asarray(graph.degree(), dtype=np.float64)
    theirs = np.rint(trans * deg * (deg - 1) / 2.0)
    out.update(
        {
            "seconds": round(ours_s, 3),
            "igraph_seconds": round(igraph_s, 3),
            "ratio": round(ours_s / max(igraph_s, 1e-9), 2),
            "agree": bool(np.array_equal(ours, theirs)),
            "triangles": int(ours.sum() // 3),
            "nodes": snap.n_nodes,
            "edges_undirected": int(keep.sum()),
            "peak_rss_mb": round(_peak_rss_mb(), 1),
            "target": TARGETS["triangles-vs-igraph"],
        }
    )
    return out


def _inner(case: str) -> dict:
    if case == "features-1m":
        return features_case(case, 1_000_000, 200_000)
    if case == "features-10m":
        return features_case(case, 10_000_000, 1_000_000)
    if case == "oracle-ratio":
        return oracle_ratio_case()
    if case == "triangles-vs-igraph":
        return triangles_vs_igraph_case()
    raise ValueError(f"unknown engine bench case {case!r}; choose one of {', '.join(CASES)}")


MEMORY_CAP_BYTES = {"features-10m": 18 * 2**30}
"""Address-space cap of a case's child process: on a shared machine a case that outgrows
its target fails with MemoryError instead of starving everything else."""


def _limit_memory(case: str):
    cap = MEMORY_CAP_BYTES.get(case)
    if cap is None:
        return None

    def apply() -> None:
        resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

    return apply


def _in_subprocess(case: str) -> dict:
    """Run one case in a fresh interpreter so its peak RSS is its own."""
    proc = subprocess.run(
        [sys.executable, "-m", "rolewatch.bench.engine_features", "--inner", case],
        preexec_fn=_limit_memory(case),
        capture_output=True,
        text=True,
        check=False,
    )
    if proc.returncode != 0:
        return {**_base(case), "error": proc.stderr.strip().splitlines()[-1:] or ["failed"]}
    if proc.stderr:
        sys.stderr.write(proc.stderr)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def run(case: str) -> Iterator[dict]:
    """Yield one result dict per case; ``case`` is a case name or ``"all"``."""
    names = CASES if case == "all" else (case,)
    for name in names:
        if name not in CASES:
            raise ValueError(
                f"unknown engine bench case {name!r}; choose one of {', '.join(CASES)}"
            )
        yield _in_subprocess(name)


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--inner":
        print(json.dumps(_inner(sys.argv[2])))
    else:
        for result in run(sys.argv[1] if len(sys.argv) > 1 else "all"):
            print(json.dumps(result))
