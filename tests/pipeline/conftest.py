"""Pipeline test helpers: the fixture sample and settings for the shared ``store_url``
(tests/conftest.py: a real SQLite file, and the real PostgreSQL when configured)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from rolewatch.config import load_settings
from rolewatch.store.db import open_store

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample"


def sample_events() -> list[dict]:
    with open(SAMPLE / "events.ndjson", encoding="utf-8") as handle:
        return [json.loads(line) for line in handle if line.strip()]


def sample_truth() -> dict:
    return json.loads((SAMPLE / "truth.json").read_text(encoding="utf-8"))


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
