"""Scale test helpers: skip without the [scale] extra (CI installs it through
scripts/venv.sh), settings for the fictional marketplace sample, a two-process Dask cluster,
and what a close wrote, for comparisons."""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import pytest
import sqlalchemy as sa

EXTRA = "needs the [scale] extra (Dask, pyarrow): pip install -e '.[test,scale]'"
pytest.importorskip("pyarrow", reason=EXTRA)
pytest.importorskip("distributed", reason=EXTRA)

from rolewatch.config import load_settings  # noqa: E402
from rolewatch.store.schema import alerts, memberships, windows  # noqa: E402

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample"
NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks


def sample_events() -> list[dict]:
    with open(SAMPLE / "events.ndjson", encoding="utf-8") as handle:
        return [json.loads(line) for line in handle if line.strip()]


def sample_settings(path: Path, **overrides):
    values = dict(
        database_url=f"sqlite:///{path}",
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
        training_windows=4,
        public_url="http://127.0.0.1:9",
    )
    values.update(overrides)
    return load_settings(**values)


def written(engine) -> dict:
    """Everything a close writes, without ids and wall-clock times."""
    with engine.connect() as connection:
        window_rows = connection.execute(
            sa.select(
                windows.c.end_us,
                windows.c.event_count,
                windows.c.account_count,
                windows.c.alert_count,
                windows.c.basis_version,
                windows.c.new_count,
                windows.c.inactive_count,
            ).order_by(windows.c.end_us)
        ).all()
        member_rows = connection.execute(
            sa.select(
                windows.c.end_us,
                memberships.c.account,
                memberships.c.mixture,
                memberships.c.score,
                memberships.c.status,
                memberships.c.dominant_role,
            )
            .join(windows, windows.c.id == memberships.c.window_id)
            .order_by(windows.c.end_us, memberships.c.account)
        ).all()
        alert_rows = connection.execute(
            sa.select(alerts.c.window_end_us, alerts.c.account, alerts.c.score).order_by(
                alerts.c.window_end_us, alerts.c.account
            )
        ).all()
    return {
        "windows": [tuple(row) for row in window_rows],
        "memberships": [tuple(row) for row in member_rows],
        "alerts": [tuple(row) for row in alert_rows],
    }


@pytest.fixture(scope="session")
def dask_cluster():
    """A local Dask cluster of two worker processes, one thread each."""
    from distributed import Client, LocalCluster

    cluster = LocalCluster(
        n_workers=2,
        threads_per_worker=1,
        processes=True,
        dashboard_address=None,
        memory_limit="1GiB",
    )
    client = Client(cluster)
    yield client
    from rolewatch.scale.dispatch import close_clients

    close_clients()  # the closer's own clients of this cluster
    client.close()
    cluster.close()
