"""Real processes for the operations tests: ``rolewatch serve`` subprocesses on loopback
ports, a loopback webhook receiver that records ``webhook-id``s, and PostgreSQL schemas.

Nothing here is a mock: the servers are the installed ``rolewatch`` command, the receiver is
a real HTTP server, the stores are a real SQLite file or the real PostgreSQL server.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections import Counter
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import httpx
import pytest
import sqlalchemy as sa

SAMPLE = Path(__file__).resolve().parents[2] / "fixtures" / "sample"
POSTGRES_URL = os.environ.get("ROLEWATCH_TEST_POSTGRES_URL")


def require_postgres() -> None:
    """Skip (or fail, under ROLEWATCH_REQUIRE_POSTGRES=1) without a PostgreSQL server."""
    if POSTGRES_URL:
        return
    if os.environ.get("ROLEWATCH_REQUIRE_POSTGRES"):
        pytest.fail("ROLEWATCH_REQUIRE_POSTGRES is set but ROLEWATCH_TEST_POSTGRES_URL is not")
    pytest.skip(
        "PostgreSQL tests need ROLEWATCH_TEST_POSTGRES_URL "
        "(CI sets it to postgresql+psycopg://postgres@127.0.0.1:5432/test)"
    )


@contextmanager
def postgres_schema():
    """A URL whose tables all land in a fresh schema, dropped afterwards."""
    schema = f"t_{uuid.uuid4().hex[:12]}"
    admin = sa.create_engine(POSTGRES_URL)
    with admin.begin() as connection:
        connection.exec_driver_sql(f'CREATE SCHEMA "{schema}"')
    separator = "&" if "?" in POSTGRES_URL else "?"
    try:
        yield f"{POSTGRES_URL}{separator}options=-csearch_path%3D{schema}"
    finally:
        with admin.begin() as connection:
            # Other sessions (a killed server's) may still hold locks for a moment.
            connection.exec_driver_sql("SET lock_timeout = '20s'")
            connection.exec_driver_sql(f'DROP SCHEMA "{schema}" CASCADE')
        admin.dispose()


def sample_events() -> list[dict]:
    with open(SAMPLE / "events.ndjson", encoding="utf-8") as handle:
        return [json.loads(line) for line in handle if line.strip()]


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def make_keys(database_url: str) -> dict[str, str]:
    """An admin and an ingest key, made through the real CLI (``keys create``)."""
    keys = {}
    for scope in ("admin", "ingest", "read"):
        done = subprocess.run(
            [sys.executable, "-m", "rolewatch.cli", "keys", "create", "--scope", scope],
            env=server_env(database_url),
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert done.returncode == 0, done.stderr
        keys[scope] = done.stdout.strip()
    return keys


def server_env(database_url: str, **settings) -> dict[str, str]:
    """The environment of a server: this test's settings only, as ROLEWATCH_* variables."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("ROLEWATCH_")}
    env["ROLEWATCH_DATABASE_URL"] = database_url
    # The fixture sample is dated in 2026: history, whatever today is (tests of the age
    # limit pass max_event_age themselves).
    env["ROLEWATCH_MAX_EVENT_AGE"] = "0"
    for name, value in settings.items():
        if isinstance(value, (list, dict, bool)):
            value = json.dumps(value)
        env[f"ROLEWATCH_{name.upper()}"] = str(value)
    return env


@dataclass
class Server:
    """One ``rolewatch serve`` process on a loopback port; its JSON log lines are collected."""

    database_url: str
    settings: dict = field(default_factory=dict)
    port: int = field(default_factory=free_port)
    process: subprocess.Popen | None = None
    lines: list[dict] = field(default_factory=list)
    raw: list[str] = field(default_factory=list)
    _reader: threading.Thread | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self, timeout: float = 90.0) -> Server:
        self.process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "rolewatch.cli",
                "serve",
                "--host",
                "127.0.0.1",
                "--port",
                str(self.port),
            ],
            env=server_env(
                self.database_url, public_url=f"http://127.0.0.1:{self.port}", **self.settings
            ),
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        deadline = time.monotonic() + timeout
        while True:
            if self.process.poll() is not None:
                self._reader.join(5)
                raise AssertionError(
                    f"server exited {self.process.returncode}:\n" + "\n".join(self.raw[-30:])
                )
            try:
                if httpx.get(self.url + "/healthz", timeout=2).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            assert time.monotonic() < deadline, "server did not become healthy in time"
            time.sleep(0.2)

    def _read(self) -> None:
        for line in self.process.stderr:
            self.raw.append(line.rstrip("\n"))
            if line.startswith("{"):
                try:
                    self.lines.append(json.loads(line))
                except ValueError:
                    pass

    def messages(self) -> list[str]:
        return [line.get("message", "") for line in self.lines]

    def wait_for_message(self, text: str, timeout: float, *, after: int = 0) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if any(text in m for m in self.messages()[after:]):
                return True
            if self.process.poll() is not None:
                return False
            time.sleep(0.02)
        return False

    def kill(self) -> None:
        """kill -9: no shutdown code runs."""
        if self.process and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(30)
        if self._reader:
            self._reader.join(5)

    def stop(self, timeout: float = 120.0) -> int:
        """SIGTERM and wait; the exit code."""
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(30)
        if self._reader:
            self._reader.join(5)
        return self.process.returncode


@contextmanager
def running(*servers: Server):
    """Start the servers; always kill what is still running on the way out."""
    try:
        for server in servers:
            server.start()
        yield servers
    finally:
        for server in servers:
            server.kill()


@dataclass
class Receiver:
    """A loopback webhook receiver answering 200 and counting deliveries by webhook-id; a
    request cut short by its sender's death is not a delivery and is not recorded."""

    port: int = field(default_factory=free_port)
    ids: list[str] = field(default_factory=list)
    bodies: dict[str, dict] = field(default_factory=dict)
    _server: ThreadingHTTPServer | None = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/hook"

    def __enter__(self) -> Receiver:
        owner = self

        class Handler(BaseHTTPRequestHandler):
            def log_message(self, *args):
                pass

            def do_POST(self):
                length = int(self.headers.get("content-length", 0))
                body = self.rfile.read(length)
                if len(body) < length:
                    # The sender died mid-request (a test killed it): nothing was delivered,
                    # and the sender, which never saw a 200, delivers it again later.
                    return
                webhook_id = self.headers.get("webhook-id", "")
                owner.ids.append(webhook_id)
                try:
                    owner.bodies[webhook_id] = json.loads(body)
                except ValueError:
                    owner.bodies[webhook_id] = {}
                self.send_response(200)
                self.send_header("content-length", "0")
                self.end_headers()

        self._server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self._server.serve_forever, daemon=True).start()
        return self

    def __exit__(self, *exc) -> None:
        self._server.shutdown()
        self._server.server_close()

    def unique(self) -> set[str]:
        return set(self.ids)

    def repeated(self) -> dict[str, int]:
        return {k: n for k, n in Counter(self.ids).items() if n > 1}


def subscribe(server: Server, admin_key: str, receiver: Receiver) -> dict:
    response = httpx.post(
        server.url + "/v1/subscriptions",
        headers={"Authorization": f"Bearer {admin_key}"},
        json={"url": receiver.url, "format": "json", "min_score": 0},
        timeout=30,
    )
    assert response.status_code in (200, 201), response.text
    return response.json()


def post_events(url: str, key: str, batch: list[dict], timeout: float = 60) -> httpx.Response:
    return httpx.post(
        url + "/v1/events",
        headers={"Authorization": f"Bearer {key}"},
        json={"events": batch},
        timeout=timeout,
    )


def windows_table(database_url: str) -> list[dict]:
    """Every stored window with its membership count, straight from the store."""
    engine = sa.create_engine(database_url)
    try:
        with engine.connect() as connection:
            rows = (
                connection.execute(
                    sa.text(
                        "SELECT w.id, w.end_us, w.account_count, w.alert_count, "
                        "(SELECT count(*) FROM memberships m WHERE m.window_id = w.id) AS members, "
                        "(SELECT count(*) FROM alerts a WHERE a.window_id = w.id) AS alerts "
                        "FROM windows w ORDER BY w.end_us"
                    )
                )
                .mappings()
                .all()
            )
        return [dict(row) for row in rows]
    finally:
        engine.dispose()


def scalar(database_url: str, sql: str, **params):
    engine = sa.create_engine(database_url)
    try:
        with engine.connect() as connection:
            return connection.execute(sa.text(sql), params).scalar()
    finally:
        engine.dispose()
