"""Schema migrations: the Alembic head matches schema.py, and concurrent starts are safe."""

from __future__ import annotations

import subprocess
import sys

import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from alembic.script import ScriptDirectory

from rolewatch.config import load_settings
from rolewatch.store.db import alembic_config, open_store
from rolewatch.store.schema import metadata


def test_migrations_build_exactly_the_schema(store_url):
    engine = open_store(load_settings(database_url=store_url))
    with engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        differences = compare_metadata(context, metadata)
    engine.dispose()
    # A difference means schema.py changed without a new revision in store/migrations/versions.
    assert differences == []


def test_open_store_twice_is_a_no_op(store_url):
    settings = load_settings(database_url=store_url)
    open_store(settings).dispose()
    engine = open_store(settings)
    with engine.connect() as connection:
        assert connection.execute(sa.text("SELECT count(*) FROM alembic_version")).scalar() == 1
    engine.dispose()


def test_two_processes_starting_at_once(store_url, tmp_path):
    script = (
        "import sys; from rolewatch.config import load_settings; "
        "from rolewatch.store.db import open_store; "
        "open_store(load_settings(database_url=sys.argv[1])).dispose()"
    )
    # Run from an unrelated directory: the migrations are found inside the installed package.
    processes = [
        subprocess.Popen(
            [sys.executable, "-c", script, store_url], stderr=subprocess.PIPE, cwd=tmp_path
        )
        for _ in range(3)
    ]
    for process in processes:
        _, err = process.communicate(timeout=120)
        assert process.returncode == 0, err.decode()
    engine = sa.create_engine(store_url)
    with engine.connect() as connection:
        rows = connection.execute(sa.text("SELECT version_num FROM alembic_version")).all()
    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    assert rows == [(head,)]
    engine.dispose()
