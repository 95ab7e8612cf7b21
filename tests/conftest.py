"""Shared fixtures: a store URL on a real SQLite file and (when configured) a real PostgreSQL
server, the real app over HTTP with keys of each scope, and a helper that makes events.

PostgreSQL runs when ROLEWATCH_TEST_POSTGRES_URL is set (CI sets it to
postgresql+psycopg://postgres@127.0.0.1:5432/test); each test gets a fresh schema of its own,
dropped afterwards. Test directories may define their own ``store_url`` to override this one.
"""

from __future__ import annotations

import os
import uuid
from dataclasses import dataclass, field

import pytest
import sqlalchemy as sa

from rolewatch.clock import now_micros

POSTGRES_URL = os.environ.get("ROLEWATCH_TEST_POSTGRES_URL")
# The fixture sample and the tests' events are dated in 2026: history, whatever today is.
# Tests of the age limit set max_event_age themselves.
os.environ.setdefault("ROLEWATCH_MAX_EVENT_AGE", "0")
SKIP_POSTGRES = "PostgreSQL tests need ROLEWATCH_TEST_POSTGRES_URL (CI sets it to postgresql+psycopg://postgres@127.0.0.1:5432/test)"


def postgres_schema_url(base_url: str, schema: str) -> str:
    """``base_url`` with a search_path option, so every table lands in ``schema``."""
    separator = "&" if "?" in base_url else "?"
    return f"{base_url}{separator}options=-csearch_path%3D{schema}"


@pytest.fixture(params=["sqlite", "postgres"])
def store_url(request, tmp_path):
    """URL of an empty store: a SQLite file in tmp_path, or a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'rolewatch.db'}"
        return
    if not POSTGRES_URL:
        if os.environ.get("ROLEWATCH_REQUIRE_POSTGRES"):
            pytest.fail("ROLEWATCH_REQUIRE_POSTGRES is set but ROLEWATCH_TEST_POSTGRES_URL is not")
        pytest.skip(SKIP_POSTGRES)
    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(POSTGRES_URL)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    yield postgres_schema_url(POSTGRES_URL, schema)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
    admin.dispose()


_counter = iter(range(10**9))


def new_event(
    time: str = "2026-02-02T10:00:00Z",
    actor: str | None = None,
    target: str | None = None,
    **fields,
) -> dict:
    """One wire event with distinct accounts unless given; extra keyword fields are added
    (``id``, ``kind``, ``weight``); pass ``id=None`` to leave the id out."""
    number = next(_counter)
    event = {
        "time": time,
        "actor": f"m-{number:05d}a" if actor is None else actor,
        "target": f"m-{number:05d}b" if target is None else target,
    }
    event.update({k: v for k, v in fields.items() if v is not None})
    return event


@pytest.fixture
def make_event():
    """The event helper: ``make_event(time=..., actor=..., target=..., id=..., weight=...)``."""
    return new_event


@dataclass
class AppClient:
    """The app under test, its settings, engine, and a full key per scope."""

    client: object
    settings: object
    engine: object
    keys: dict[str, str] = field(default_factory=dict)

    def headers(self, scope: str = "admin", **extra) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.keys[scope]}", **extra}


@pytest.fixture
def app_settings(store_url):
    """Settings for the app under test; tests override fields with ``model_copy``."""
    from rolewatch.config import load_settings

    return load_settings(database_url=store_url, max_batch_events=100, max_batch_bytes=65536)


@pytest.fixture
def app_client(app_settings):
    """The real app (jobs off) served through Starlette's TestClient, with keys of each scope."""
    from fastapi.testclient import TestClient

    from rolewatch.api.app import create_app
    from rolewatch.store.db import open_store
    from rolewatch.store.keys import create_key

    engine = open_store(app_settings)
    now = now_micros()
    keys = {
        scope: create_key(engine, [scope], label=f"test {scope}", now_us=now)[1]
        for scope in ("ingest", "read", "admin")
    }
    app = create_app(app_settings, run_jobs=False)
    with TestClient(app) as client:
        yield AppClient(client, app_settings, engine, keys)
    engine.dispose()
