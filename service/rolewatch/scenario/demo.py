"""``rolewatch demo``: the whole service on the fictional marketplace, end to end.

It starts the real service on a temporary SQLite database, starts a small local receiver
subscribed in ``text`` format that prints each alert as it arrives (after checking its
Standard Webhooks signature), replays the scenario through the real HTTP ingest in batches,
waits until every window has closed and every alert has been delivered, and then keeps
serving with the web address and an API key printed, until Ctrl-C (``--exit`` stops after
the replay instead).
"""

from __future__ import annotations

import argparse
import base64
import hashlib
import hmac
import json
import socket
import sys
import tempfile
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path

import httpx

from rolewatch.clock import now_micros
from rolewatch.scenario import generate


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def _say(message: str) -> None:
    print(message, flush=True)


class AlertPrinter(BaseHTTPRequestHandler):
    """A chat-style incoming webhook: takes ``{"text": ...}``, checks the signature, prints."""

    secret: bytes = b""
    received: list[str] = []
    lock = threading.Lock()

    def do_POST(self):  # noqa: N802 - http.server's naming
        body = self.rfile.read(int(self.headers.get("content-length") or 0))
        message_id = self.headers.get("webhook-id", "")
        stamp = self.headers.get("webhook-timestamp", "")
        expected = base64.b64encode(
            hmac.new(self.secret, f"{message_id}.{stamp}.".encode() + body, hashlib.sha256).digest()
        ).decode()
        offered = [
            part.split(",", 1)[-1] for part in self.headers.get("webhook-signature", "").split()
        ]
        if not any(hmac.compare_digest(expected, candidate) for candidate in offered):
            self.send_response(401)
            self.end_headers()
            return
        try:
            text = json.loads(body)["text"]
        except (ValueError, KeyError, TypeError):
            self.send_response(400)
            self.end_headers()
            return
        with self.lock:
            if message_id not in self.received:
                self.received.append(message_id)
                _say("\n── alert received (signature verified) " + "─" * 30 + "\n" + text)
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args):  # keep the terminal for alerts
        pass


def _parse(rest: list[str]) -> argparse.Namespace:
    parser = argparse.ArgumentParser(prog="rolewatch demo", description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=0, help="scenario seed (default 0)")
    parser.add_argument(
        "--members", type=int, default=3000, help="marketplace members (default 3000)"
    )
    parser.add_argument("--weeks", type=int, default=16, help="weekly windows (default 16)")
    parser.add_argument(
        "--port", type=int, default=8000, help="HTTP port of the service (default 8000)"
    )
    parser.add_argument("--data-dir", help="keep the database here instead of a temporary folder")
    parser.add_argument("--exit", action="store_true", help="stop once the replay is processed")
    parser.add_argument(
        "--timeout", type=float, default=1800, help="give up after this many seconds"
    )
    return parser.parse_args(rest)


def main(args) -> int:
    options = _parse(list(getattr(args, "rest", None) or []))
    import uvicorn

    from rolewatch.api.app import create_app
    from rolewatch.config import load_settings
    from rolewatch.logs import configure_logging
    from rolewatch.store.db import open_store
    from rolewatch.store.keys import create_key

    workdir = Path(options.data_dir or tempfile.mkdtemp(prefix="rolewatch-demo-"))
    workdir.mkdir(parents=True, exist_ok=True)
    base_url = f"http://127.0.0.1:{options.port}"
    settings = load_settings(
        getattr(args, "config", None),
        database_url=f"sqlite:///{workdir / 'demo.db'}",
        host="127.0.0.1",
        port=options.port,
        public_url=base_url,
        idle_close_after="3s",
        tick_interval="1s",
        webhook_allow_http=True,
        webhook_allow_hosts=["127.0.0.1"],
        delivery_backoff="2s",
        log_level="WARNING",
        sqlite_synchronous="NORMAL",
        max_event_age="0",  # the scenario's weeks are fixed dates, history whatever today is
    )
    configure_logging(settings.log_level, json_lines=settings.log_json)
    engine = open_store(settings)
    now_us = now_micros()
    _, admin_key = create_key(engine, ["admin"], label="demo", now_us=now_us)
    _, reviewer_key = create_key(
        engine, ["review"], label="demo reviewer", now_us=now_us, name="Demo reviewer"
    )
    engine.dispose()

    receiver_port = _free_port()
    AlertPrinter.received = []
    receiver = ThreadingHTTPServer(("127.0.0.1", receiver_port), AlertPrinter)
    threading.Thread(target=receiver.serve_forever, daemon=True).start()

    server = uvicorn.Server(
        uvicorn.Config(
            create_app(settings),
            host="127.0.0.1",
            port=options.port,
            log_config=None,
            access_log=False,
        )
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    headers = {"authorization": f"Bearer {admin_key}"}
    client = httpx.Client(base_url=base_url, headers=headers, timeout=120)
    deadline = time.monotonic() + 60
    while not server.started:
        if time.monotonic() > deadline or not thread.is_alive():
            _say(
                f"rolewatch demo: the service did not start on port {options.port}; "
                "is it in use? try --port"
            )
            return 1
        time.sleep(0.1)

    subscription = client.post(
        "/v1/subscriptions",
        json={"url": f"http://127.0.0.1:{receiver_port}/hook", "format": "text", "min_score": 0},
    )
    subscription.raise_for_status()
    AlertPrinter.secret = base64.b64decode(subscription.json()["secret"].removeprefix("whsec_"))

    _say(
        f"rolewatch demo: generating the marketplace (seed {options.seed}, "
        f"{options.members} members, {options.weeks} weeks)"
    )
    scenario = generate(seed=options.seed, members=options.members, weeks=options.weeks)
    events = list(scenario.iter_events())
    _say(f"rolewatch demo: replaying {len(events):,} events through POST /v1/events")
    started = time.monotonic()
    for offset in range(0, len(events), 1000):
        chunk = events[offset : offset + 1000]
        body = "\n".join(json.dumps(event) for event in chunk).encode()
        answer = client.post(
            "/v1/events", content=body, headers={"content-type": "application/x-ndjson"}
        )
        answer.raise_for_status()
    _say(
        f"rolewatch demo: ingest done in {time.monotonic() - started:.1f} s; "
        "windows close as the watermark passes"
    )

    expected_windows = options.weeks
    deadline = time.monotonic() + options.timeout
    closed = 0
    while time.monotonic() < deadline:
        listing = client.get("/v1/windows").json()
        closed_now = len(listing["closed"])
        if closed_now != closed:
            closed = closed_now
            _say(f"rolewatch demo: {closed}/{expected_windows} windows closed")
        pending = client.get("/v1/deliveries", params={"status": "pending"}).json()
        if closed >= expected_windows and not pending["deliveries"]:
            break
        time.sleep(1)

    from rolewatch.scenario.demo_review import review_a_few

    reviewed = review_a_few(
        client, {"authorization": f"Bearer {reviewer_key}"}, list(scenario.truth)
    )
    alerts = client.get("/v1/alerts", params={"limit": 200}).json()
    alert_items = alerts["alerts"]
    takeovers = [record["account"] for record in scenario.truth if record["change"] == "takeover"]
    caught = sorted({item["account"] for item in alert_items} & set(takeovers))
    _say("")
    _say(
        f"rolewatch demo: {closed} windows closed, {len(alert_items)} alerts, "
        f"{len(AlertPrinter.received)} delivered to the receiver"
    )
    _say(
        f"  review:      {reviewed['confirmed']} cases confirmed, {reviewed['dismissed']} "
        f"dismissed by the demo reviewer; figures at {base_url}/review/stats"
    )
    _say(f"  web pages:   {base_url}/   (sign in with the key below)")
    _say(f"  API key:     {admin_key}")
    _say(f"  reviewer key: {reviewer_key}   (review scope: can confirm and dismiss cases)")
    _say(f"  API schema:  {base_url}/openapi.json   (with the key, as a Bearer header)")
    if caught:
        _say(f"  a taken-over account: {base_url}/accounts/{caught[0]}")
    _say("  Alerts are leads for human review, not verdicts.")
    if options.exit:
        server.should_exit = True
        thread.join(timeout=30)
        receiver.shutdown()
        return 0 if closed >= expected_windows else 1
    _say("rolewatch demo: serving; press Ctrl-C to stop")
    try:
        while thread.is_alive():
            time.sleep(0.5)
    except KeyboardInterrupt:
        server.should_exit = True
        thread.join(timeout=30)
    receiver.shutdown()
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main(argparse.Namespace(rest=sys.argv[1:])))
