"""Scale test helpers: skip without the [scale] extra (CI installs it through
scripts/venv.sh), settings and weekly windows of the fictional marketplace sample, a
two-process Dask cluster, and what a close wrote, for comparisons."""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import sqlalchemy as sa

EXTRA = "needs the [scale] extra (Dask, pyarrow): pip install -e '.[test,scale]'"
pytest.importorskip("pyarrow", reason=EXTRA)
pytest.importorskip("distributed", reason=EXTRA)

from rolewatch.config import load_settings  # noqa: E402
from rolewatch.pipeline.loading import interned  # noqa: E402
from rolewatch.pipeline.model import fit_model  # noqa: E402
from rolewatch.pipeline.offline import split_windows  # noqa: E402
from rolewatch.pipeline.windows import WindowGeometry  # noqa: E402
from rolewatch.store.events import parse_time_us  # noqa: E402
from rolewatch.store.models import active_model  # noqa: E402
from rolewatch.store.schema import alerts, memberships, pair_history, windows  # noqa: E402

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample"
NOW = int(datetime(2026, 12, 1).timestamp() * 1_000_000)  # long after the sample's weeks


def sample_events() -> list[dict]:
    with open(SAMPLE / "events.ndjson", encoding="utf-8") as handle:
        return [json.loads(line) for line in handle if line.strip()]


def write_archive(
    archive: str, events: list[dict], period_us: int, rows_per_group: int | None = None
) -> None:
    """Append ``events`` (the sample's dicts) to the event archive at ``archive`` (Parquet
    row groups of at most ``rows_per_group`` rows when given)."""
    from rolewatch.scale.archive import events_table, write_events

    write_events(
        archive,
        events_table(
            [e["id"] for e in events],
            [parse_time_us(e["time"]) for e in events],
            [e["actor"] for e in events],
            [e["target"] for e in events],
            [e.get("kind") for e in events],
            [float(e.get("weight", 1.0)) for e in events],
        ),
        period_us,
        rows_per_group,
    )


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


@pytest.fixture(scope="module")
def sample_windows(tmp_path_factory):
    """The sample split into weekly windows (interned as the closer loads them) and a model
    fitted on the first four."""
    events = sample_events()
    settings = sample_settings(tmp_path_factory.mktemp("model") / "unused.db")
    time_us = np.array([parse_time_us(e["time"]) for e in events])
    columns = {
        "event_id": np.array([e["id"] for e in events], dtype=object),
        "actor": np.array([e["actor"] for e in events], dtype=object),
        "target": np.array([e["target"] for e in events], dtype=object),
        "weight": np.array([float(e.get("weight", 1.0)) for e in events]),
    }
    windows = [
        interned(*(values[rows] for values in columns.values()))
        for _start, _end, rows in split_windows(time_us, WindowGeometry.from_settings(settings))
    ]
    model = fit_model(settings, [w.snapshot() for w in windows[: settings.training_windows]])
    return model, windows


def written(engine) -> dict:
    """Everything a close writes, without ids and wall-clock times: the active model (its
    recipe, basis and roles), windows, memberships, each account's activity and tie cells,
    the known-pair history and the alerts."""
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
        count_rows = connection.execute(
            sa.select(
                windows.c.end_us,
                memberships.c.account,
                memberships.c.events_out,
                memberships.c.events_in,
                memberships.c.counterparts,
                memberships.c.new_counterparts,
                memberships.c.ties_out_known,
                memberships.c.ties_out_new,
                memberships.c.ties_in_known,
                memberships.c.ties_in_new,
            )
            .join(windows, windows.c.id == memberships.c.window_id)
            .order_by(windows.c.end_us, memberships.c.account)
        ).all()
        pair_rows = connection.execute(
            sa.select(windows.c.end_us, pair_history.c.pair_count, pair_history.c.pairs)
            .join(windows, windows.c.id == pair_history.c.window_id)
            .order_by(windows.c.end_us)
        ).all()
        alert_rows = connection.execute(
            sa.select(alerts.c.window_end_us, alerts.c.account, alerts.c.score).order_by(
                alerts.c.window_end_us, alerts.c.account
            )
        ).all()
        model = active_model(connection)
    return {
        "model": None if model is None else (model.recipe, model.basis, model.roles),
        "windows": [tuple(row) for row in window_rows],
        "memberships": [tuple(row) for row in member_rows],
        "counts": [tuple(row) for row in count_rows],
        "pairs": [(end, count, bytes(keys)) for end, count, keys in pair_rows],
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
