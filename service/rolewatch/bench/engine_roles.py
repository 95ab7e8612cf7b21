"""Benchmarks of the role engine (RolX membership refits).

Each case yields one JSON-serialisable dict with ``case``, ``cores``, ``seconds``,
``peak_rss_mb`` and the sizes involved.  Each case runs in a child process so the peak
resident memory reported is that case's own.  Timings are measured here, never asserted
in tests.

Cases
-----
``memberships-200k``
    :meth:`RoleBasis.memberships` for 200,000 nodes x 40 features x 8 roles
    (target <= 2 s).
``nnls-vs-scipy``
    The same refit for 5,000 nodes beside :func:`scipy.optimize.nnls` called node by
    node; reports both times, their ratio and the largest coefficient difference.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from collections.abc import Iterator

import numpy as np

CASES = ("memberships-200k", "nnls-vs-scipy", "fit-200k")
TARGETS = {"memberships-200k": {"seconds": 2.0}, "nnls-vs-scipy": {}, "fit-200k": {}}


def _problem(n: int, f: int = 40, k: int = 8, seed: int = 0):
    """A role basis and a binned-looking feature matrix built from it plus noise."""
    from rolewatch.engine.basis import RoleBasis

    rng = np.random.default_rng(seed)
    F = rng.gamma(0.6, 1.0, (k, f)) * (rng.random((k, f)) < 0.6)
    F[np.arange(k), rng.integers(0, f, k)] += 1.0
    G = rng.dirichlet(np.full(k, 0.3), n) * rng.uniform(0.5, 6.0, (n, 1))
    V = np.clip(np.rint(G @ F * 4 + rng.normal(0, 0.5, (n, f))), 0, None)
    basis = RoleBasis(
        F=F / F.sum(1, keepdims=True),
        role_ids=tuple(range(k)),
        feature_names=tuple(f"feat_{j}" for j in range(f)),
        recipe_version=None,
    )
    return basis, V


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: KiB


def _measure(case: str) -> dict:
    if case == "memberships-200k":
        n, f, k = 200_000, 40, 8
        basis, V = _problem(n, f, k)
        basis.memberships(V[:1000])  # warm-up (imports, BLAS threads)
        t0 = time.perf_counter()
        m = basis.memberships(V)
        seconds = time.perf_counter() - t0
        return {
            "nodes": n,
            "features": f,
            "roles": k,
            "seconds": round(seconds, 4),
            "median_error": float(np.median(m.error)),
            "target_seconds": TARGETS[case]["seconds"],
        }
    if case == "nnls-vs-scipy":
        from scipy.optimize import nnls

        n, f, k = 5_000, 40, 8
        basis, V = _problem(n, f, k, seed=1)
        t0 = time.perf_counter()
        ours = basis.memberships(V).loadings
        t_ours = time.perf_counter() - t0
        t0 = time.perf_counter()
        ref = np.array([nnls(basis.F.T, v)[0] for v in V])
        t_ref = time.perf_counter() - t0
        return {
            "nodes": n,
            "features": f,
            "roles": k,
            "seconds": round(t_ours, 4),
            "scipy_seconds": round(t_ref, 4),
            "speedup": round(t_ref / t_ours, 1),
            "max_abs_diff": float(np.abs(ours - ref).max()),
        }
    if case == "fit-200k":
        from rolewatch.engine.basis import RoleBasis

        n, f, k = 200_000, 40, 8
        _, V = _problem(n, f, k, seed=2)
        t0 = time.perf_counter()
        basis = RoleBasis.fit(V, k_range=(2, 12), seed=0)
        seconds = time.perf_counter() - t0
        return {
            "nodes": n,
            "features": f,
            "planted_roles": k,
            "chosen_roles": basis.n_roles,
            "mdl_rows": basis.summary["mdl_rows"],
            "seconds": round(seconds, 2),
        }
    raise ValueError(f"unknown benchmark case {case!r}; choose one of {', '.join(CASES)}")


def run(case: str) -> Iterator[dict]:
    """Run one case (or ``"all"``) and yield one result dict per case."""
    cases = CASES if case == "all" else (case,)
    for name in cases:
        if name not in CASES:
            raise ValueError(
                f"unknown benchmark case {name!r}; choose one of {', '.join(CASES)} or all"
            )
        code = (
            "import json, sys; from rolewatch.bench.engine_roles import _child; "
            "print(json.dumps(_child(sys.argv[1])))"
        )
        proc = subprocess.run(
            [sys.executable, "-c", code, name], capture_output=True, text=True, check=False
        )
        if proc.returncode != 0:
            raise RuntimeError(f"benchmark case {name} failed:\n{proc.stderr.strip()}")
        yield json.loads(proc.stdout.strip().splitlines()[-1])


def _child(case: str) -> dict:
    result: dict[str, object] = {
        "case": case,
        "cores": os.cpu_count(),
        "blas_threads": os.environ.get("OPENBLAS_NUM_THREADS")
        or os.environ.get("OMP_NUM_THREADS")
        or "default",
    }
    result.update(_measure(case))
    result["peak_rss_mb"] = round(_peak_rss_mb(), 1)
    return result


if __name__ == "__main__":  # pragma: no cover - manual use
    for row in run(sys.argv[1] if len(sys.argv) > 1 else "all"):
        print(json.dumps(row))
