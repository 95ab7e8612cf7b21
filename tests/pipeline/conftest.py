"""Stores for pipeline tests: a real SQLite file, and the real PostgreSQL when configured."""

from __future__ import annotations

import json
import os
import uuid
from pathlib import Path

import pytest
import sqlalchemy as sa

from rolewatch.config import load_settings
from rolewatch.store.db import open_store

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample"
POSTGRES_URL = os.environ.get("ROLEWATCH_TEST_POSTGRES_URL")


def sample_events() -> list[dict]:
    with open(SAMPLE / "events.ndjson", encoding="utf-8") as handle:
        return [json.loads(line) for line in handle if line.strip()]


def sample_truth() -> dict:
    return json.loads((SAMPLE / "truth.json").read_text(encoding="utf-8"))


@pytest.fixture(params=["sqlite", "postgres"])
def store_url(request, tmp_path):
    """A database URL for an empty store; PostgreSQL gets a schema of its own per test."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'rolewatch.db'}"
        return
    if not POSTGRES_URL:
        if os.environ.get("ROLEWATCH_REQUIRE_POSTGRES"):
            pytest.fail("ROLEWATCH_REQUIRE_POSTGRES is set but ROLEWATCH_TEST_POSTGRES_URL is not")
        pytest.skip("PostgreSQL tests need ROLEWATCH_TEST_POSTGRES_URL (CI sets it)")
    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(POSTGRES_URL)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    separator = "&" if "?" in POSTGRES_URL else "?"
    yield f"{POSTGRES_URL}{separator}options=-csearch_path%3D{schema}"
    with admin.begin() as connection:
        connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
    admin.dispose()


@pytest.fixture
def make_settings(store_url):
    def build(**overrides):
        values = dict(
            database_url=store_url,
            window_period="7d",
            window_span="7d",
            window_lateness="1h",
            training_windows=4,
            public_url="http://127.0.0.1:9",
        )
        values.update(overrides)
        return load_settings(**values)

    return build


@pytest.fixture
def store(make_settings):
    settings = make_settings()
    engine = open_store(settings)
    yield engine, settings
    engine.dispose()
