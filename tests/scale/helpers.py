"""Comparisons of two stores' closes, with the tolerances of docs/scale.md, and the app
served on loopback for tests over real HTTP."""

from __future__ import annotations

import json
import socket
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager

import pytest


def assert_same_closes(left: dict, right: dict) -> None:
    """Same windows, accounts, statuses, roles, activity and tie cells, known pairs and
    alerts; mixtures and scores within 1e-9 (both stored from float64 computations whose
    sums may run in another order). The models may have been fitted on different backends:
    their features, roles and basis must be the same, their bin edges within 1e-12 relative
    (sums in another order), so their versions, which hash the edges' bits, may differ."""
    assert_same_models(left["model"], right["model"])
    versions = {right["model"][1]["version"]: left["model"][1]["version"]} if left["model"] else {}
    assert [row[:4] + row[5:] for row in left["windows"]] == [
        row[:4] + row[5:] for row in right["windows"]
    ]
    assert [row[4] for row in left["windows"]] == [
        versions.get(row[4], row[4]) for row in right["windows"]
    ]
    assert left["counts"] == right["counts"]
    assert left["pairs"] == right["pairs"]
    assert len(left["memberships"]) == len(right["memberships"])
    for ours, theirs in zip(left["memberships"], right["memberships"], strict=True):
        end, account, mixture, score, status, dominant = ours
        assert (end, account, status, dominant) == (theirs[0], theirs[1], theirs[4], theirs[5])
        a, b = json.loads(mixture or "{}"), json.loads(theirs[2] or "{}")
        assert a.keys() == b.keys()
        for role in a:
            assert a[role] == pytest.approx(b[role], abs=1e-9)
        if score is None or theirs[3] is None:
            assert score is None and theirs[3] is None
        else:
            assert score == pytest.approx(theirs[3], rel=1e-9, abs=1e-9)
    assert [row[:2] for row in left["alerts"]] == [row[:2] for row in right["alerts"]]
    for ours, theirs in zip(left["alerts"], right["alerts"], strict=True):
        assert ours[2] == pytest.approx(theirs[2], rel=1e-9)


def assert_same_models(left: tuple | None, right: tuple | None) -> None:
    """Two stored models (recipe, basis and roles as stored) fitted on the same windows:
    the same features, bin edges within 1e-12 relative, the same basis and roles; the
    versions are left out (they hash the edges' bits)."""
    assert (left is None) == (right is None)
    if left is None or right is None:
        return
    (recipe, basis, roles), (their_recipe, their_basis, their_roles) = left, right
    assert [f["name"] for f in recipe["features"]] == [f["name"] for f in their_recipe["features"]]
    for ours, theirs in zip(recipe["features"], their_recipe["features"], strict=True):
        assert len(ours["edges"]) == len(theirs["edges"])
        assert ours["edges"] == pytest.approx(theirs["edges"], rel=1e-12, abs=0)
    unversioned = {"version", "recipe_version"}
    assert {k: v for k, v in recipe.items() if k not in unversioned | {"features"}} == {
        k: v for k, v in their_recipe.items() if k not in unversioned | {"features"}
    }
    assert {k: v for k, v in basis.items() if k not in unversioned} == {
        k: v for k, v in their_basis.items() if k not in unversioned
    }
    assert roles == their_roles


def scheduler_transitions(address: str) -> int:
    """Task state transitions the Dask scheduler at ``address`` has made so far."""
    from distributed import Client

    with Client(address, timeout="30s") as client:
        return int(
            client.run_on_scheduler(lambda dask_scheduler: dask_scheduler.transition_counter)
        )


@contextmanager
def served(app) -> Iterator[str]:
    """Serve ``app`` with uvicorn on a free loopback port in a thread; yields its base URL."""
    import uvicorn

    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.bind(("127.0.0.1", 0))
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", lifespan="on"))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            raise RuntimeError("the app did not start within 30 s")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{sock.getsockname()[1]}"
    finally:
        server.should_exit = True
        thread.join(timeout=15)
        sock.close()
