"""Per-window outputs as Parquet: every measured window (the training windows' back-fill
included) lands in its own partition, sorted by account with row-group statistics, and one
account's history read from it equals what the store holds.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import json

import pandas as pd
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa

from rolewatch.pipeline.closer import close_due_windows
from rolewatch.scale import output_reads
from rolewatch.scale.output_reads import OutputIndex, account_history, archived_window_ends
from rolewatch.scale.pair_outputs import write_window_pairs
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.schema import memberships, windows

from .conftest import NOW, sample_events, sample_settings


def test_closed_windows_are_written_sorted_and_read_back_per_account(tmp_path):
    outputs = tmp_path / "outputs"
    settings = sample_settings(tmp_path / "store.db", output_archive=str(outputs))
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    with engine.connect() as connection:
        stored = pd.DataFrame(
            connection.execute(
                sa.select(
                    windows.c.end_us,
                    windows.c.training,
                    memberships.c.account,
                    memberships.c.score,
                    memberships.c.status,
                    memberships.c.mixture,
                ).join(windows, windows.c.id == memberships.c.window_id)
            ).all()
        )
    engine.dispose()
    measured = stored
    files = sorted(outputs.glob("window_end_us=*/memberships.parquet"))
    assert [int(f.parent.name.split("=")[1]) for f in files] == sorted(set(measured["end_us"]))
    for file in files:
        # pyarrow's own Parquet metadata: sorted accounts, min/max statistics per row group
        accounts = pq.read_table(file, columns=["account"]).column("account").to_pylist()
        assert accounts == sorted(accounts)
        metadata = pq.ParquetFile(file).metadata
        assert metadata.row_group(0).column(0).statistics.has_min_max
    account = measured["account"].value_counts().index[0]
    history = account_history(str(outputs), account)
    mine = measured[measured["account"] == account].sort_values("end_us", ascending=False)
    assert [row["window_end_us"] for row in history] == list(mine["end_us"])
    for row, (_, expected) in zip(history, mine.iterrows(), strict=True):
        assert row["status"] == expected["status"]
        if expected["score"] is None or pd.isna(expected["score"]):
            assert row["score"] is None
        else:
            assert row["score"] == pytest.approx(expected["score"], rel=1e-6)
        shares = json.loads(expected["mixture"]) if expected["mixture"] else {}
        assert row["mixture"].keys() == shares.keys()
        for role, share in shares.items():
            assert row["mixture"][role] == pytest.approx(share, abs=1e-6)


def test_a_folder_holding_only_pairs_is_not_a_window_of_the_history(tmp_path, monkeypatch):
    outputs = tmp_path / "outputs"
    settings = sample_settings(tmp_path / "store.db", output_archive=str(outputs))
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    engine.dispose()
    measured = archived_window_ends(str(outputs))
    assert measured == sorted(
        int(f.parent.name.split("=")[1])
        for f in outputs.glob("window_end_us=*/memberships.parquet")
    )
    # an older window closed before the outputs were set: its pairs only (written at a Dask
    # close), and a folder some other tool left without the partition's name
    write_window_pairs(str(outputs), 1_000_000, [1, 2, 3])
    (outputs / "notes").mkdir()
    (outputs / "notes" / "memberships.parquet").write_bytes(b"")
    assert archived_window_ends(str(outputs)) == measured
    opened: list[int] = []
    real_open = output_reads._open_window

    def counted_open(path, end_us):
        opened.append(end_us)
        return real_open(path, end_us)

    monkeypatch.setattr(output_reads, "_open_window", counted_open)
    account = sample_events()[0]["actor"]
    history = account_history(OutputIndex(str(outputs)), account)
    assert history and 1_000_000 not in opened
    assert sorted(opened) == measured
