"""Windows above ``store_memberships_max_accounts`` keep their memberships only in the Parquet
outputs: the store still gets the window records, alerts and evidence, and every later close
reads those windows' memberships back from Parquet, so the alerts and scores are the ones a
store holding everything gives.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa

from rolewatch.config import ConfigError, load_settings
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.pipeline.model import load_active_model
from rolewatch.scale.output_reads import stored_window
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.memberships import window_columns
from rolewatch.store.schema import alerts, memberships, windows

from .conftest import NOW, sample_events, sample_settings


def _close(url: str, outputs: Path, **overrides) -> tuple[dict, list[tuple[int, int]]]:
    settings = sample_settings(Path("unused"), output_archive=str(outputs), **overrides)
    settings = settings.model_copy(update={"database_url": url})
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        window_rows = connection.execute(
            sa.select(
                windows.c.end_us,
                windows.c.account_count,
                windows.c.alert_count,
                windows.c.new_count,
                windows.c.inactive_count,
                windows.c.scored_count,
                windows.c.reconstruction_error,
            ).order_by(windows.c.end_us)
        ).all()
        alert_rows = connection.execute(
            sa.select(
                alerts.c.window_end_us,
                alerts.c.account,
                alerts.c.score,
                alerts.c.role_before,
                alerts.c.role_after,
                alerts.c.evidence,
            ).order_by(alerts.c.window_end_us, alerts.c.account)
        ).all()
        held = connection.execute(
            sa.select(windows.c.end_us, sa.func.count())
            .join(memberships, memberships.c.window_id == windows.c.id)
            .group_by(windows.c.end_us)
        ).all()
    engine.dispose()
    return {"windows": [tuple(r) for r in window_rows], "alerts": [tuple(r) for r in alert_rows]}, [
        tuple(r) for r in held
    ]


def _outputs(folder: Path) -> dict[str, object]:
    """Every window file read with pyarrow's own Parquet reader."""
    return {
        file.parent.name: pq.read_table(file)
        for file in sorted(folder.glob("window_end_us=*/memberships.parquet"))
    }


def _evidence(text) -> dict:
    return json.loads(text) if isinstance(text, str) else text


def _assert_same(everything: dict, other: dict) -> None:
    assert [row[:6] for row in other["windows"]] == [row[:6] for row in everything["windows"]]
    for ours, theirs in zip(other["windows"], everything["windows"], strict=True):
        if theirs[6] is None:
            assert ours[6] is None
        else:
            assert ours[6] == pytest.approx(theirs[6], rel=1e-9)
    assert [row[:2] for row in other["alerts"]] == [row[:2] for row in everything["alerts"]]
    assert everything["alerts"], "the sample raises alerts after training"
    for ours, theirs in zip(other["alerts"], everything["alerts"], strict=True):
        assert ours[2] == pytest.approx(theirs[2], rel=1e-9)
        assert ours[3:5] == theirs[3:5]
        assert _evidence(ours[5]) == _evidence(theirs[5])


@pytest.fixture(scope="module")
def everything_stored(tmp_path_factory):
    """The sample closed on SQLite with every window's memberships in the store."""
    folder = tmp_path_factory.mktemp("everything")
    written, held = _close(f"sqlite:///{folder / 'store.db'}", folder / "outputs")
    return folder, written, held


def test_windows_above_the_limit_close_to_the_same_alerts_and_scores(
    everything_stored, store_url, tmp_path
):
    folder, everything, held_all = everything_stored
    counts = sorted(row[1] for row in everything["windows"])
    # Below every window (nothing stored); on SQLite also between them (some windows in
    # each place).
    limits = [1, counts[len(counts) // 2]] if store_url.startswith("sqlite") else [1]
    for limit in limits:
        outputs = tmp_path / f"outputs-{limit}"
        url = store_url if limit == 1 else f"sqlite:///{tmp_path / 'mixed.db'}"
        written, held = _close(url, outputs, store_memberships_max_accounts=limit)
        _assert_same(everything, written)
        expected = {end for end, accounts, *_ in everything["windows"] if accounts <= limit}
        assert {end for end, _ in held} == expected
        assert limit > 1 or not held
        # The Parquet files equal row for row (pyarrow's Table.equals) those of the close
        # that kept everything in the store.
        mine, reference = _outputs(outputs), _outputs(folder / "outputs")
        assert mine.keys() == reference.keys() and len(mine) == len(held_all)
        for name, table in reference.items():
            assert mine[name].equals(table), name


def test_a_window_read_back_from_parquet_equals_the_store_read(everything_stored):
    folder, everything, _ = everything_stored
    engine = sa.create_engine(f"sqlite:///{folder / 'store.db'}")
    with engine.connect() as connection:
        ids = dict(connection.execute(sa.select(windows.c.end_us, windows.c.id)).all())
        model = load_active_model(connection)
        assert model is not None
        # the model's roles in reverse, and a role no mixture holds (its column is 0)
        role_ids = [str(role) for role in reversed(model.basis.role_ids)] + ["999"]
        for end_us, *_ in everything["windows"]:
            stored = window_columns(connection, ids[end_us], role_ids)
            archived = stored_window(str(folder / "outputs"), end_us, role_ids)
            order = np.argsort(stored.accounts.astype(str))
            assert list(archived.accounts) == list(stored.accounts[order])
            assert np.array_equal(archived.mixture, stored.mixture[order])
            assert archived.mixture.flags.c_contiguous and stored.mixture.flags.c_contiguous
            assert not stored.mixture[:, -1].any() and stored.mixture.sum() > 0
            # the stored JSON read back row by row (the standard library's decoder)
            rows = connection.execute(
                sa.select(memberships.c.account, memberships.c.mixture).where(
                    memberships.c.window_id == ids[end_us]
                )
            ).all()
            position = {account: i for i, account in enumerate(stored.accounts)}
            for account, text in rows:
                shares = json.loads(text)
                expected = [shares.get(role, 0.0) for role in role_ids]
                assert stored.mixture[position[account]].tolist() == expected
            assert list(archived.status) == list(stored.status[order])
            for name in ("events_out", "events_in", "counterparts", "new_counterparts"):
                assert np.array_equal(getattr(archived, name), getattr(stored, name)[order])
            assert np.array_equal(archived.ties, stored.ties[order], equal_nan=True)
            assert np.array_equal(archived.community, stored.community[order])
    engine.dispose()


def test_a_window_read_in_small_batches_equals_the_read_in_one(everything_stored, monkeypatch):
    from dataclasses import fields

    from rolewatch.store import memberships as stored_memberships
    from rolewatch.store.memberships import StoredWindow

    folder, everything, _ = everything_stored
    engine = sa.create_engine(f"sqlite:///{folder / 'store.db'}")
    with engine.connect() as connection:
        ids = dict(connection.execute(sa.select(windows.c.end_us, windows.c.id)).all())
        role_ids = ["2", "0", "1"]
        for end_us, accounts, *_ in everything["windows"]:
            whole = window_columns(connection, ids[end_us], role_ids)
            monkeypatch.setattr(stored_memberships, "READ_BATCH_ROWS", 7)
            batched = window_columns(connection, ids[end_us], role_ids)
            monkeypatch.undo()
            assert len(batched.accounts) == accounts > 7
            for field in fields(StoredWindow):
                got, expected = getattr(batched, field.name), getattr(whole, field.name)
                assert got.dtype == expected.dtype and got.shape == expected.shape
                assert np.array_equal(got, expected, equal_nan=got.dtype.kind == "f"), field
    engine.dispose()


def test_the_limit_needs_the_parquet_outputs(tmp_path):
    with pytest.raises(ConfigError, match="ROLEWATCH_OUTPUT_ARCHIVE"):
        load_settings(
            database_url=f"sqlite:///{tmp_path / 'x.db'}", store_memberships_max_accounts=1000
        )
