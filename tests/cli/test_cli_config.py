"""The rolewatch command run as a real process, and settings from the environment and TOML."""

from __future__ import annotations

import csv
import hashlib
import json
import os
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
import sqlalchemy as sa

from rolewatch.config import ConfigError, load_settings
from rolewatch.store.events import derived_event_id, file_line_event_id, parse_time_us
from rolewatch.store.schema import events as events_table

KEY_FORM = re.compile(r"rwk_[0-9a-f]{12}_[A-Za-z0-9_-]{43}")


def rolewatch(*args, env=None, timeout=120) -> subprocess.CompletedProcess:
    environment = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    environment["ROLEWATCH_MAX_EVENT_AGE"] = "0"  # the tests' events are dated in 2026
    environment.update(env or {})
    return subprocess.run(
        [sys.executable, "-m", "rolewatch.cli", *args],
        capture_output=True,
        text=True,
        env=environment,
        timeout=timeout,
    )


def stored_events(url: str) -> list[tuple]:
    engine = sa.create_engine(url)
    with engine.connect() as connection:
        rows = connection.execute(
            sa.select(
                events_table.c.event_id,
                events_table.c.time_us,
                events_table.c.actor,
                events_table.c.target,
                events_table.c.kind,
                events_table.c.weight,
            ).order_by(events_table.c.event_id)
        ).all()
    engine.dispose()
    return [tuple(row) for row in rows]


# --- settings ----------------------------------------------------------------------------------


def test_settings_from_toml_and_environment(tmp_path, monkeypatch):
    for name in list(os.environ):
        if name.startswith("ROLEWATCH_"):
            monkeypatch.delenv(name)
    config = tmp_path / "rolewatch.toml"
    config.write_text(
        'window_period = "1d"\nwindow_span = "2d"\nmax_batch_events = 500\nmetrics_public = true\n'
    )
    settings = load_settings(config)
    assert settings.window_period.total_seconds() == 86_400
    assert settings.window_span.total_seconds() == 2 * 86_400
    assert settings.max_batch_events == 500 and settings.metrics_public is True
    monkeypatch.setenv("ROLEWATCH_MAX_BATCH_EVENTS", "250")  # the environment beats the file
    monkeypatch.setenv("ROLEWATCH_WINDOW_LATENESS", "30m")
    settings = load_settings(config)
    assert settings.max_batch_events == 250
    assert settings.window_lateness.total_seconds() == 1800


def test_bad_settings_raise_config_error(tmp_path):
    with pytest.raises(ConfigError, match="max_batch_events"):
        load_settings(max_batch_events=0)
    bad = tmp_path / "bad.toml"
    bad.write_text("window_period = [")
    with pytest.raises(ConfigError):
        load_settings(bad)
    with pytest.raises(ConfigError, match="does not exist"):
        load_settings(tmp_path / "missing.toml")


# --- exit codes --------------------------------------------------------------------------------


def test_bad_config_value_exits_2_with_the_message(tmp_path):
    env = {
        "ROLEWATCH_DATABASE_URL": f"sqlite:///{tmp_path / 'x.db'}",
        "ROLEWATCH_WINDOW_PERIOD": "soon",
    }
    result = rolewatch("keys", "list", env=env)
    assert result.returncode == 2
    assert "window_period (ROLEWATCH_WINDOW_PERIOD)" in result.stderr and "7d" in result.stderr
    config = tmp_path / "bad.toml"
    config.write_text("max_batch_events = -3\n")
    result = rolewatch(
        "keys",
        "list",
        "--config",
        str(config),
        env={"ROLEWATCH_DATABASE_URL": f"sqlite:///{tmp_path / 'x.db'}"},
    )
    assert result.returncode == 2 and "max_batch_events" in result.stderr


@pytest.mark.parametrize(
    "args",
    [
        ("--config", "/nonexistent/rolewatch.toml", "keys", "list"),
        ("frobnicate",),
        ("keys", "create"),  # --scope is required
        ("keys", "create", "--scope", "superuser"),
        ("replay", "/nonexistent/events.ndjson"),
        ("bench", "no-such-case"),
    ],
)
def test_usage_errors_exit_2(tmp_path, args):
    result = rolewatch(*args, env={"ROLEWATCH_DATABASE_URL": f"sqlite:///{tmp_path / 'x.db'}"})
    assert result.returncode == 2, result.stderr
    assert result.stderr.strip()


def test_other_failures_exit_1(tmp_path):
    # A database that cannot be opened (a directory where the file should be).
    (tmp_path / "dir.db").mkdir()
    result = rolewatch(
        "keys", "list", env={"ROLEWATCH_DATABASE_URL": f"sqlite:///{tmp_path / 'dir.db'}"}
    )
    assert result.returncode == 1
    assert "error" in result.stderr


# --- keys --------------------------------------------------------------------------------------


def test_keys_create_prints_only_the_key(store_url):
    env = {"ROLEWATCH_DATABASE_URL": store_url}
    result = rolewatch(
        "keys", "create", "--scope", "ingest", "--scope", "read", "--label", "shop app", env=env
    )
    assert result.returncode == 0, result.stderr
    assert KEY_FORM.fullmatch(result.stdout.rstrip("\n")), result.stdout
    assert result.stdout.count("\n") == 1
    key = result.stdout.strip()
    listed = rolewatch("keys", "list", env=env)
    assert listed.returncode == 0
    key_id = key.split("_")[1]
    (line,) = [line for line in listed.stdout.splitlines() if line.startswith(key_id)]
    assert "ingest,read" in line and "active" in line and "shop app" in line
    assert key.split("_", 2)[2] not in listed.stdout
    assert rolewatch("keys", "revoke", key_id, env=env).returncode == 0
    assert "revoked" in rolewatch("keys", "list", env=env).stdout
    assert rolewatch("keys", "revoke", key_id, env=env).returncode == 2


# --- replay ------------------------------------------------------------------------------------


def _replay_events(make_event) -> list[dict]:
    events = [
        make_event(
            time=f"2026-01-{1 + i % 20:02d}T{i % 24:02d}:15:00Z",
            id=f"r-{i}",
            kind="payment" if i % 3 else None,
            weight=round(1 + i * 0.25, 2),
        )
        for i in range(80)
    ]
    events += [make_event(time="2026-01-05T08:00:00+02:00", actor="m-a", target="m-b")]  # no id
    events += [make_event(time="2026-01-05T08:00:00", actor="m-a", target="m-c")]  # naive: rejected
    events += [dict(events[3])]  # duplicate
    return events


def _write_csv(path, events) -> None:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(
            handle, fieldnames=["id", "time", "actor", "target", "kind", "weight"]
        )
        writer.writeheader()
        for event in events:
            writer.writerow({k: ("" if v is None else v) for k, v in event.items()})


def test_replay_ndjson_and_csv_store_what_the_api_stores(app_client, tmp_path, make_event):
    events = _replay_events(make_event)
    response = app_client.client.post(
        "/v1/events", json={"events": events}, headers=app_client.headers("ingest")
    )
    assert response.json()["accepted"] == 81 and len(response.json()["rejected"]) == 1
    through_api = stored_events(app_client.settings.database_url)

    ndjson = tmp_path / "events.ndjson"
    ndjson.write_text("\n".join(json.dumps(e) for e in events) + "\n", encoding="utf-8")
    csv_file = tmp_path / "events.csv"
    _write_csv(csv_file, events)
    for path, fmt in ((ndjson, "ndjson"), (csv_file, "csv")):
        url = f"sqlite:///{tmp_path / (fmt + '.db')}"
        result = rolewatch(
            "replay",
            str(path),
            "--format",
            fmt,
            "--no-close",
            "--batch-size",
            "50",
            env={"ROLEWATCH_DATABASE_URL": url},
        )
        assert result.returncode == 0, result.stderr
        summary = json.loads(result.stdout)
        assert (summary["accepted"], summary["duplicates"], summary["rejected"]) == (81, 1, 1)
        assert f"line {82 if fmt == 'ndjson' else 83}: time:" in result.stderr  # the naive time
        # the same events; the one without an id is named by the file and its line (81 in
        # NDJSON, 82 in CSV after the header) instead of by a hash of its fields
        digest = hashlib.sha256(path.read_bytes()).hexdigest()
        line_id = file_line_event_id(digest, 81 if fmt == "ndjson" else 82)
        replayed = stored_events(url)
        assert sorted(row[1:] for row in replayed) == sorted(row[1:] for row in through_api)
        assert {row[0] for row in replayed} ^ {row[0] for row in through_api} == {
            line_id,
            derived_event_id(parse_time_us("2026-01-05T08:00:00+02:00"), "m-a", "m-b", None, 1.0),
        }, fmt


@pytest.mark.parametrize(
    "header, said",
    [
        ("time,actor,kind", "lacks the column target"),  # not "target: required" per line
        ("id,time,actor,target,weigth", "column 'weigth', which is no event field"),
    ],
)
def test_replay_of_a_csv_with_a_wrong_header_stops_at_once(tmp_path, header, said):
    path = tmp_path / "events.csv"
    lines = [header] + [f"e-{n},2026-01-05T10:15:00Z,m-a,m-b,1" for n in range(50)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    url = f"sqlite:///{tmp_path / 'replay.db'}"
    done = rolewatch("replay", str(path), "--no-progress", env={"ROLEWATCH_DATABASE_URL": url})
    assert done.returncode == 2, done.stderr
    assert said in done.stderr and done.stderr.count("\n") <= 2
    assert "line 2" not in done.stderr  # no per-line reasons
    assert stored_events(url) == []


def test_replay_keeps_distinct_lines_without_ids_apart_and_stays_idempotent(tmp_path):
    # Exports at minute resolution often hold the same interaction twice in one minute, with
    # no ids (invented rows): each line is an event of its own, and replaying the file again
    # stores nothing new.
    rows = [
        {"time": "2026-01-05T10:15:00Z", "actor": "m-a", "target": "m-b", "kind": "message"},
        {"time": "2026-01-05T10:15:00Z", "actor": "m-a", "target": "m-b", "kind": "message"},
        {"time": "2026-01-05T10:16:00Z", "actor": "m-b", "target": "m-a", "kind": "message"},
    ]
    ndjson = tmp_path / "messages.ndjson"
    ndjson.write_text("".join(json.dumps(row) + "\n" for row in rows), encoding="utf-8")
    csv_file = tmp_path / "messages.csv"
    _write_csv(csv_file, [{"id": None, **row, "weight": None} for row in rows])
    for path, fmt in ((ndjson, "ndjson"), (csv_file, "csv")):
        url = f"sqlite:///{tmp_path / (fmt + '.db')}"
        env = {"ROLEWATCH_DATABASE_URL": url}
        first = rolewatch("replay", str(path), "--no-close", "--no-progress", env=env)
        assert first.returncode == 0, first.stderr
        assert (json.loads(first.stdout)["accepted"], json.loads(first.stdout)["duplicates"]) == (
            3,
            0,
        ), fmt
        again = rolewatch("replay", str(path), "--no-close", "--no-progress", env=env)
        assert (json.loads(again.stdout)["accepted"], json.loads(again.stdout)["duplicates"]) == (
            0,
            3,
        ), fmt
        stored = stored_events(url)
        assert len(stored) == len({row[0] for row in stored}) == 3, fmt


def test_replay_reports_each_closed_window_once(tmp_path):
    # the fictional marketplace sample's first five weeks (fixtures/sample, invented data):
    # two training windows, then three scored ones; a back-filled training window is one
    # window, not two
    sample = Path(__file__).resolve().parents[2] / "fixtures" / "sample" / "events.ndjson"
    lines = [
        line
        for line in sample.read_text(encoding="utf-8").splitlines()
        if line.strip() and json.loads(line)["time"] < "2026-02-05"
    ]
    path = tmp_path / "five-weeks.ndjson"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    url = f"sqlite:///{tmp_path / 'replay.db'}"
    result = rolewatch(
        "replay",
        str(path),
        "--no-progress",
        env={"ROLEWATCH_DATABASE_URL": url, "ROLEWATCH_TRAINING_WINDOWS": "2"},
    )
    assert result.returncode == 0, result.stderr
    summary = json.loads(result.stdout)
    engine = sa.create_engine(url)
    with engine.connect() as connection:
        stored = connection.execute(sa.text("SELECT count(*) FROM windows")).scalar_one()
    engine.dispose()
    assert stored == 5
    assert summary["windows_closed"] == stored


# --- serve -------------------------------------------------------------------------------------


def test_serve_answers_over_http_and_stops_cleanly(tmp_path):
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    env.update(
        ROLEWATCH_DATABASE_URL=f"sqlite:///{tmp_path / 'serve.db'}", ROLEWATCH_TICK_INTERVAL="1s"
    )
    process = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "rolewatch.cli",
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            str(port),
        ],
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    try:
        deadline = time.monotonic() + 60
        while True:
            try:
                response = httpx.get(f"http://127.0.0.1:{port}/healthz", timeout=1)
                break
            except httpx.HTTPError:
                assert process.poll() is None, process.stderr.read().decode()
                assert time.monotonic() < deadline, "server did not start"
                time.sleep(0.2)
        assert response.json() == {"status": "ok", "database": "ok"}
        assert httpx.get(f"http://127.0.0.1:{port}/v1/roles").status_code == 401
    finally:
        process.terminate()
        _, err = process.communicate(timeout=60)
    # uvicorn shuts down gracefully on SIGTERM, then ends by that signal (or 0).
    assert process.returncode in (0, -signal.SIGTERM), err.decode()
    lines = [
        json.loads(line) for line in err.decode().splitlines() if line.startswith("{")
    ]  # JSON logs
    messages = [line.get("message") for line in lines]
    assert "rolewatch started" in messages and "rolewatch stopped" in messages
