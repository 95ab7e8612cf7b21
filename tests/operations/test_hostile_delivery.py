"""Hostile subscriptions and hostile account ids on their way to a chat channel, over real
HTTP: addresses that hide a blocked IPv4 address inside IPv6, a resolver that hangs, and
account ids written to look like links or like other accounts."""

from __future__ import annotations

import json
import socket
import threading
import time

import httpx
import pytest

from .hostile import serve_in_thread
from .servers import Receiver, Server, make_keys, post_events, sample_events

HIDDEN_IPV4 = [
    # RFC 3056 section 2 (6to4): 2002:V4ADDR::/48.
    ("https://[2002:7f00:1::]/hook", "6to4 address carrying 127.0.0.1"),
    ("https://[2002:a9fe:a9fe::]/latest", "6to4 address carrying 169.254.169.254"),
    # RFC 6052 section 2.1 (NAT64 well-known prefix): 64:ff9b::/96.
    ("https://[64:ff9b::a9fe:a9fe]/latest", "NAT64 address carrying 169.254.169.254"),
    # RFC 4380 section 4 (Teredo): the client address is the inverted last 32 bits.
    ("https://[2001:0:5db8:d822:8000:63bf:80ff:fffe]/", "Teredo client address carrying 127"),
    # RFC 4291 section 2.5.5.2 (IPv4-mapped).
    ("https://[::ffff:169.254.169.254]/", "IPv4-mapped form of 169.254.169.254"),
]


@pytest.mark.parametrize("url, reason", HIDDEN_IPV4)
def test_ipv6_forms_of_blocked_ipv4_are_refused(live, url, reason):
    response = live.request("POST", "/v1/subscriptions", json={"url": url, "format": "json"})
    assert response.status_code == 422, response.text
    assert reason in response.json()["detail"]


def test_a_slow_resolver_does_not_stall_ingest(store_url, monkeypatch):
    """The review saw one event wait 5.5 s behind a subscription's DNS lookup: the lookup ran
    inside the write transaction. The resolver here is the real one, held at a gate."""
    from rolewatch.api.app import create_app
    from rolewatch.clock import now_micros
    from rolewatch.config import load_settings
    from rolewatch.store.db import open_store
    from rolewatch.store.keys import create_key

    entered, release = threading.Event(), threading.Event()
    real_getaddrinfo = socket.getaddrinfo

    def gated(host, *args, **kwargs):
        if host == "slow-resolver.test":
            entered.set()
            release.wait(60)
        return real_getaddrinfo(host, *args, **kwargs)

    monkeypatch.setattr(socket, "getaddrinfo", gated)
    settings = load_settings(database_url=store_url, log_json=False, log_level="WARNING")
    engine = open_store(settings)
    keys = {s: create_key(engine, [s], now_us=now_micros())[1] for s in ("admin", "ingest")}
    engine.dispose()
    outcome: dict = {}
    with serve_in_thread(create_app(settings, run_jobs=False)) as url:

        def subscribe() -> None:
            outcome["response"] = httpx.post(
                url + "/v1/subscriptions",
                headers={"Authorization": f"Bearer {keys['admin']}"},
                json={"url": "https://slow-resolver.test/hook", "format": "json"},
                timeout=120,
            )

        creating = threading.Thread(target=subscribe)
        creating.start()
        try:
            assert entered.wait(30), "the subscription never looked its host up"
            event = {"time": "2026-02-02T10:00:00Z", "actor": "m-dns-a", "target": "m-dns-b"}
            # While the lookup hangs, ingest answers (on SQLite it used to wait for the lock).
            answered = post_events(url, keys["ingest"], [event], timeout=15)
            assert answered.status_code == 202 and answered.json()["accepted"] == 1
            assert not release.is_set() and creating.is_alive()
        finally:
            release.set()
            creating.join(60)
    assert outcome["response"].status_code == 422  # .test names do not resolve


def _hostile_sample() -> tuple[list[dict], dict[str, str]]:
    """The fixture sample with every account renamed: odd numbers to a Markdown link, even
    numbers to an id with a no-break space inside. Returns the events and the new names."""
    names: dict[str, str] = {}

    def rename(account: str) -> str:
        number = int(account.split("-")[1])
        if number % 2:
            return names.setdefault(account, f"[{account}](https://verify.example.test/x)")
        return names.setdefault(account, f"{account[:4]}\u00a0{account[4:]}")

    events = []
    for event in sample_events():
        events.append({**event, "actor": rename(event["actor"]), "target": rename(event["target"])})
    return events, names


def test_text_webhooks_show_ids_as_code_and_visibly(store_url):
    from markdown_it import MarkdownIt

    keys = make_keys(store_url)
    settings = {
        "tick_interval": "1s",
        "idle_close_after": "2s",
        "training_windows": 4,
        "webhook_allow_http": True,
        "webhook_allow_hosts": ["127.0.0.1"],
        "delivery_backoff": "1s",
    }
    with Receiver() as receiver:
        server = Server(store_url, settings).start()
        try:
            made = httpx.post(
                server.url + "/v1/subscriptions",
                headers={"Authorization": f"Bearer {keys['admin']}"},
                json={"url": receiver.url, "format": "text", "min_score": 0},
                timeout=30,
            )
            assert made.status_code == 201, made.text
            events, names = _hostile_sample()
            for start in range(0, len(events), 2000):
                response = post_events(server.url, keys["ingest"], events[start : start + 2000])
                assert response.status_code == 202 and not response.json()["rejected"]
            deadline = time.monotonic() + 240
            while time.monotonic() < deadline and len(receiver.bodies) < 3:
                time.sleep(1)
        finally:
            server.kill()
    texts = [body["text"] for body in receiver.bodies.values()]
    assert len(texts) >= 3, f"only {len(texts)} alerts arrived"
    shown = {name.replace("\u00a0", "‹U+00A0›") for name in names.values()}
    parser = MarkdownIt("commonmark")  # markdown-it-py, a CommonMark 0.31 reference parser
    for text in texts:
        line = next(line for line in text.splitlines() if line.startswith("Role change"))
        tokens = parser.parseInline(line)[0].children
        codes = [token.content for token in tokens if token.type == "code_inline"]
        assert len(codes) == 1 and codes[0] in shown, line
        assert not any(token.type == "link_open" for token in tokens), line
        assert "\u00a0" not in text
    print(json.dumps(texts[0]))
