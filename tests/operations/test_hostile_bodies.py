"""Hostile bodies over real HTTP: the key is checked before any body is read, bodies beyond
their limit are refused from the Content-Length alone (or as soon as a chunked body passes
it), and a request whose head or body stops arriving is dropped.

Limits: ``max_body_bytes`` (64 KB by default) for every route but ``POST /v1/events``,
whose limit is ``max_batch_bytes``; ``http_header_timeout`` and ``http_body_timeout``.
"""

from __future__ import annotations

import psutil
import pytest

from .hostile import closed_by_server, connect, head, read_response, status_of

BODY_ROUTES = [
    ("POST", "/v1/subscriptions"),
    ("PATCH", "/v1/roles/1"),
    ("POST", "/v1/admin/basis"),
]
HUGE = 120_000_000  # the size the review sent


@pytest.mark.parametrize("method, path", BODY_ROUTES)
def test_no_key_is_refused_before_the_body_is_read(live, method, path):
    with connect(live) as sock:
        declared = {"Content-Type": "application/json", "Content-Length": str(HUGE)}
        sock.sendall(head(method, path, declared) + b'{"url": "' + b"x" * 1000)
        # The server answers while nearly all the announced body is still unsent.
        answer = read_response(sock, timeout=20)
    assert status_of(answer) == 401, answer[:300]
    assert b"missing API key" in answer
    assert b"connection: close" in answer.lower()


@pytest.mark.parametrize("method, path", BODY_ROUTES)
def test_a_declared_body_over_the_limit_is_refused_at_once(live, method, path):
    with connect(live) as sock:
        declared = {
            **live.headers("admin"),
            "Content-Type": "application/json",
            "Content-Length": str(65_537),  # one byte over the default max_body_bytes
        }
        sock.sendall(head(method, path, declared))
        answer = read_response(sock, timeout=20)
    assert status_of(answer) == 413, answer[:300]
    assert b"65537 bytes" in answer and b"65536" in answer


def test_ingest_keeps_its_own_larger_limit(live):
    batch_limit = 10_000_000  # max_batch_bytes default
    with connect(live) as sock:
        declared = {
            **live.headers("ingest"),
            "Content-Type": "application/json",
            "Content-Length": str(batch_limit + 1),
        }
        sock.sendall(head("POST", "/v1/events", declared))
        answer = read_response(sock, timeout=20)
    assert status_of(answer) == 413, answer[:300]
    with connect(live) as sock:
        declared = {"Content-Type": "application/json", "Content-Length": str(batch_limit)}
        sock.sendall(head("POST", "/v1/events", declared) + b'{"events": [')
        assert status_of(read_response(sock, timeout=20)) == 401


def test_a_chunked_body_is_cut_when_it_passes_the_limit(live):
    with connect(live) as sock:
        declared = {
            **live.headers("admin"),
            "Content-Type": "application/json",
            "Transfer-Encoding": "chunked",
        }
        sock.sendall(head("POST", "/v1/subscriptions", declared))
        chunk = b"x" * 16_384
        try:
            for _ in range(8):  # 128 KB announced chunk by chunk, twice the limit
                sock.sendall(b"%x\r\n" % len(chunk) + chunk + b"\r\n")
        except (BrokenPipeError, ConnectionResetError):
            pass  # the server may already have answered and closed
        answer = read_response(sock, timeout=20)
    assert status_of(answer) == 413, answer[:300]


def test_no_key_body_does_not_grow_the_server(live):
    """The review saw resident memory grow by about 900 MB for one 120 MB body."""
    process = psutil.Process(live.server.process.pid)
    before = process.memory_info().rss
    sent = 0
    with connect(live) as sock:
        declared = {"Content-Type": "application/json", "Content-Length": str(HUGE)}
        sock.sendall(head("POST", "/v1/subscriptions", declared))
        block = b"7" * 1_000_000
        try:
            while sent < HUGE:
                sock.sendall(block)
                sent += len(block)
        except (BrokenPipeError, ConnectionResetError):
            pass  # refused and closed: the rest is never read
        read_response(sock, timeout=5)
    grown = process.memory_info().rss - before
    print(f"sent {sent / 1e6:.0f} MB without a key; server RSS grew {grown / 1e6:.1f} MB")
    assert grown < 30_000_000


def test_a_head_that_never_ends_is_dropped(live):
    with connect(live) as sock:
        sock.sendall(b"POST /v1/events HTTP/1.1\r\nHost: 127.0.0.1\r\nX-Slow: 1")
        assert closed_by_server(sock, within=30)
    with connect(live) as sock:  # a connection that never sends a byte
        assert closed_by_server(sock, within=30)


def test_a_body_that_stops_half_way_is_dropped(live):
    with connect(live) as sock:
        declared = {
            **live.headers("ingest"),
            "Content-Type": "application/json",
            "Content-Length": "5000",
        }
        sock.sendall(head("POST", "/v1/events", declared) + b'{"events": [')
        answer = read_response(sock, timeout=30)
        assert status_of(answer) == 408, answer[:300]
        assert closed_by_server(sock, within=10)
