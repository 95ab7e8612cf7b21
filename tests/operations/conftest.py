"""Fixtures for the operations tests: store URLs on a real SQLite file and, when configured, a
fresh schema on the real PostgreSQL server (ROLEWATCH_TEST_POSTGRES_URL); CI sets
ROLEWATCH_REQUIRE_POSTGRES=1 so a missing server fails instead of skipping."""

from __future__ import annotations

from contextlib import contextmanager

import pytest

from .servers import postgres_schema, require_postgres


@pytest.fixture(params=["sqlite", "postgres"])
def store_url(request, tmp_path):
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'rolewatch.db'}"
        return
    require_postgres()
    with postgres_schema() as url:
        yield url


@pytest.fixture
def postgres_url():
    require_postgres()
    with postgres_schema() as url:
        yield url


@pytest.fixture(scope="module", params=["sqlite", "postgres"])
def live(request, tmp_path_factory):
    """A ``rolewatch serve`` (API only, short read timeouts) on a fresh store of each kind,
    with keys of every scope: the hostile-input suite shares one per module and store."""
    from .hostile import LIVE_SETTINGS, Live
    from .servers import Server, make_keys

    with _store_for(request.param, tmp_path_factory) as url:
        keys = make_keys(url)
        server = Server(url, dict(LIVE_SETTINGS)).start()
        try:
            yield Live(server, url, keys)
        finally:
            server.kill()


@contextmanager
def _store_for(kind: str, tmp_path_factory):
    if kind == "sqlite":
        yield f"sqlite:///{tmp_path_factory.mktemp('hostile') / 'rolewatch.db'}"
        return
    require_postgres()
    with postgres_schema() as url:
        yield url
