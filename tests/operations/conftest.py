"""Fixtures for the operations tests: store URLs on a real SQLite file and, when configured, a
fresh schema on the real PostgreSQL server (ROLEWATCH_TEST_POSTGRES_URL); CI sets
ROLEWATCH_REQUIRE_POSTGRES=1 so a missing server fails instead of skipping."""

from __future__ import annotations

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
