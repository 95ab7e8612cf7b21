"""The delivery worker: claim due deliveries, sign and send them, record every attempt.

One run of ``deliver_due`` has three steps, and only the first and last touch the database
(through ``rolewatch.store.outbox`` and ``rolewatch.store.subscriptions``):

1. *Claim* (one short write transaction): pick due ``pending`` rows of live, unpaused
   subscriptions — on PostgreSQL with ``SELECT … FOR UPDATE SKIP LOCKED`` so concurrent
   workers never pick the same row, on SQLite under the write lock — count the attempt and
   push ``next_attempt_us`` past a lease, so no other worker takes the row while it is sent.
2. *Send* (no transaction open): re-check the URL against the SSRF guard, connect to the
   checked address, sign with the subscription's active secrets, never follow redirects,
   read at most a short snippet of the answer.
3. *Record* (one short write transaction per delivery): the attempt row, then the delivery's
   new state — delivered, retried later with exponential backoff and jitter, or failed after
   ``delivery_max_attempts``; the subscription's consecutive failures, pausing it after
   ``subscription_pause_after`` of them or at once on ``410 Gone``.

A worker that dies between claim and record leaves the row pending; it is sent again once the
lease runs out (at-least-once delivery, same ``webhook-id``).
"""

from __future__ import annotations

import logging
import random
import socket
import ssl
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import httpx

from rolewatch import metrics
from rolewatch.clock import now_micros, now_seconds
from rolewatch.config import Settings
from rolewatch.delivery.payloads import plain
from rolewatch.delivery.signing import webhook_headers
from rolewatch.delivery.subscriptions import active_secrets
from rolewatch.delivery.urlguard import CheckedURL, Resolver, UnsafeURL, check_url_for
from rolewatch.store import outbox as outbox_store
from rolewatch.store import subscriptions as subscription_store
from rolewatch.store.db import Connection, Engine, write_transaction
from rolewatch.store.subscriptions import FailureCount

log = logging.getLogger(__name__)

BACKOFF_CAP_S = 6 * 3600
SNIPPET_BYTES = 256
SNIPPET_CHARS = 200
USER_AGENT = "rolewatch-webhooks/0.1"


@dataclass(frozen=True)
class Claim:
    """A delivery this worker holds for one attempt."""

    delivery_id: str
    subscription_id: str
    attempt: int  # the attempt number this claim counts (1 for the first send)
    body: bytes = field(repr=False)
    url: str = field(repr=False)  # may carry a receiver's token in its path
    secrets: tuple[str, ...] = field(repr=False)  # never printed or logged


@dataclass(frozen=True)
class AttemptResult:
    """What one send did: an HTTP status, or an error that says what went wrong."""

    status_code: int | None
    error: str | None
    duration_ms: float

    @property
    def ok(self) -> bool:
        return self.status_code is not None and 200 <= self.status_code < 300

    @property
    def gone(self) -> bool:
        return self.status_code == 410


@dataclass
class DeliveryReport:
    """Counts of what one ``deliver_due`` run did."""

    attempted: int = 0
    delivered: int = 0
    retrying: int = 0
    failed: int = 0
    paused: list[str] = field(default_factory=list)


def backoff_seconds(attempt: int, base_s: float, *, rng: random.Random | None = None) -> float:
    """Delay after failed attempt number ``attempt``: base · 2^(attempt-1), ±20 % jitter,
    capped at 6 hours. Jitter spreads retries of many deliveries that failed together."""
    uniform = rng.uniform if rng is not None else random.uniform
    delay = base_s * (2 ** min(attempt - 1, 40))
    return min(delay * uniform(0.8, 1.2), BACKOFF_CAP_S)


def _lease_us(settings: Settings) -> int:
    per_send = settings.delivery_connect_timeout + settings.delivery_timeout
    rounds = -(-settings.delivery_batch_size // settings.delivery_concurrency)
    return int((per_send.total_seconds() * rounds + 60) * 1_000_000)


def claim_due(engine: Engine, settings: Settings, now_us: int) -> list[Claim]:
    """Take up to ``delivery_batch_size`` due deliveries for this worker (step 1)."""
    with write_transaction(engine) as connection:
        rows = outbox_store.claim_due(
            connection,
            now_us=now_us,
            limit=settings.delivery_batch_size,
            lease_until_us=now_us + _lease_us(settings),
        )
    return [
        Claim(
            delivery_id=row.delivery_id,
            subscription_id=row.subscription_id,
            attempt=row.attempt,
            body=row.body.encode("utf-8"),
            url=row.url,
            secrets=tuple(
                active_secrets(
                    row.secret, row.previous_secret, row.previous_secret_until_us, now_us
                )
            ),
        )
        for row in rows
    ]


def _ssl_context(settings: Settings) -> ssl.SSLContext:
    context = ssl.create_default_context(cafile=settings.delivery_ca_bundle or None)
    return context


def make_client(settings: Settings) -> httpx.Client:
    """An HTTP client for webhooks: timeouts, no redirects, no proxies from the environment
    (a proxy would defeat the address pinning), certificates checked."""
    return httpx.Client(
        timeout=httpx.Timeout(
            settings.delivery_timeout.total_seconds(),
            connect=settings.delivery_connect_timeout.total_seconds(),
        ),
        follow_redirects=False,
        trust_env=False,
        # A fresh connection per send, so TotalDeadline always sees the socket it must cut.
        limits=httpx.Limits(max_keepalive_connections=0),
        verify=_ssl_context(settings),
        headers={"user-agent": USER_AGENT},
    )


def _snippet(response: httpx.Response) -> str:
    """At most ``SNIPPET_BYTES`` of the answer: read as a stream, the rest is never read."""
    collected = b""
    for chunk in response.iter_raw(SNIPPET_BYTES):
        collected += chunk
        if len(collected) >= SNIPPET_BYTES:
            break
    text = collected[:SNIPPET_BYTES].decode("utf-8", errors="replace")
    return plain(text, SNIPPET_CHARS)


class TotalDeadline:
    """Cut a request off when its total time runs out, whatever phase it is in.

    httpx timeouts bound each connect, read or write separately, so a receiver that trickles
    a byte at a time could hold a worker for hours. The request's ``trace`` extension hands
    over the socket as soon as it is connected; a timer shuts it down at the deadline, which
    makes the blocked read fail at once.
    """

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self.expired = False
        self._sockets: list[socket.socket] = []
        self._lock = threading.Lock()
        self._timer = threading.Timer(seconds, self._expire)
        self._timer.daemon = True
        self._timer.start()

    def trace(self, event: str, info: dict[str, Any]) -> None:
        """httpcore ``trace`` callback: remember each socket it connects."""
        if event != "connection.connect_tcp.complete":
            return
        stream = info.get("return_value")
        sock = stream.get_extra_info("socket") if stream is not None else None
        if sock is None:
            return
        with self._lock:
            self._sockets.append(sock)
            if self.expired:
                self._shut(sock)

    @staticmethod
    def _shut(sock: socket.socket) -> None:
        try:
            sock.shutdown(socket.SHUT_RDWR)
        except OSError:  # already closed
            pass

    def _expire(self) -> None:
        with self._lock:
            self.expired = True
            for sock in self._sockets:
                self._shut(sock)

    def cancel(self) -> None:
        self._timer.cancel()


def send_one(
    claim: Claim, settings: Settings, client: httpx.Client, resolver: Resolver | None = None
) -> AttemptResult:
    """Check, sign and POST one delivery (step 2). Never raises; errors become the result."""
    started = time.monotonic()

    def result(status: int | None, error: str | None) -> AttemptResult:
        return AttemptResult(status, error, round((time.monotonic() - started) * 1000, 1))

    try:
        checked = check_url_for(claim.url, settings, resolver)
    except UnsafeURL as refused:
        return result(None, f"not sent: {refused}")
    headers = webhook_headers(claim.secrets, claim.delivery_id, now_seconds(), claim.body)
    headers["content-type"] = "application/json"
    headers["host"] = checked.host_header
    deadline = TotalDeadline(settings.delivery_timeout.total_seconds())
    response = None
    try:
        response, failure = _post(client, claim, checked, headers, deadline)
        if response is None:
            return result(None, failure)
        return result(*_judge(response))
    finally:
        deadline.cancel()
        if response is not None:
            response.close()


def _post(
    client: httpx.Client,
    claim: Claim,
    checked: CheckedURL,
    headers: dict[str, str],
    deadline: TotalDeadline,
) -> tuple[httpx.Response | None, str]:
    """POST the body to the checked addresses in turn until one answers: the streamed
    response, or ``None`` and why no answer came."""
    extensions: dict[str, Any] = {"trace": deadline.trace}
    if checked.scheme == "https" and not checked.is_ip_literal:
        extensions["sni_hostname"] = checked.host  # TLS name = the URL's host, not the IP
    failure = ""
    for address in checked.addresses:  # every one was checked; try the next if one refuses
        request = client.build_request(
            "POST",
            checked.pinned_url(address),
            content=claim.body,
            headers=headers,
            extensions=extensions,
        )
        try:
            return client.send(request, stream=True), ""
        except httpx.HTTPError as error:
            if deadline.expired or isinstance(error, httpx.TimeoutException):
                return None, (
                    "timed out: no complete answer within the total timeout of "
                    f"{deadline.seconds:g}s"
                )
            if not isinstance(error, httpx.ConnectError):
                return None, f"{type(error).__name__}: {plain(error, SNIPPET_CHARS)}"
            failure = f"could not connect: {plain(error, SNIPPET_CHARS) or 'refused'}"
    return None, failure


def _judge(response: httpx.Response) -> tuple[int, str | None]:
    """The status code of an answer, and what went wrong unless it is a 2xx."""
    code = response.status_code
    if 200 <= code < 300:
        return code, None
    if 300 <= code < 400:
        location = plain(response.headers.get("location", "(none)"), SNIPPET_CHARS)
        return code, (
            f"redirect {code} to {location} not followed: set the subscription URL to "
            "the final address"
        )
    try:
        snippet = _snippet(response)
    except httpx.HTTPError:
        snippet = ""
    reason = "gone: the receiver asked to stop; subscription paused" if code == 410 else ""
    return code, " — ".join(p for p in (f"HTTP {code}", reason, snippet) if p)


def record_attempt(
    engine: Engine,
    settings: Settings,
    claim: Claim,
    outcome: AttemptResult,
    now_us: int,
    report: DeliveryReport,
) -> None:
    """Store the attempt and move the delivery and its subscription on (step 3)."""
    with write_transaction(engine) as connection:
        outbox_store.insert_attempt(
            connection,
            claim.delivery_id,
            attempted_us=now_us,
            status_code=outcome.status_code,
            error=outcome.error,
            duration_ms=outcome.duration_ms,
        )
        progress = outbox_store.delivery_progress(connection, claim.delivery_id)
        # Redelivered, deleted or re-claimed after our lease ran out: the attempt is history,
        # the row belongs to whoever holds it now.
        if progress is None or progress.status != "pending" or progress.attempts != claim.attempt:
            return
        if outcome.ok:
            _record_delivered(connection, claim, outcome, now_us, report)
            return
        counted = subscription_store.failure_count(connection, claim.subscription_id)
        _record_failed_send(connection, settings, claim, outcome, now_us, report)
        _count_subscription_failure(connection, settings, claim, outcome, counted, report)


def _record_delivered(
    connection: Connection,
    claim: Claim,
    outcome: AttemptResult,
    now_us: int,
    report: DeliveryReport,
) -> None:
    """The receiver took it: the delivery is done and the subscription's failures reset."""
    outbox_store.mark_delivered(
        connection,
        claim.delivery_id,
        delivered_us=now_us,
        status_code=outcome.status_code,
        error=outcome.error,
    )
    subscription_store.reset_failures(connection, claim.subscription_id)
    report.delivered += 1
    metrics.DELIVERIES.labels(outcome="delivered").inc()


def _record_failed_send(
    connection: Connection,
    settings: Settings,
    claim: Claim,
    outcome: AttemptResult,
    now_us: int,
    report: DeliveryReport,
) -> None:
    """The send failed: retry after a backoff, or give up after the last allowed attempt."""
    if claim.attempt >= settings.delivery_max_attempts:
        outbox_store.mark_failed(
            connection, claim.delivery_id, status_code=outcome.status_code, error=outcome.error
        )
        report.failed += 1
        metrics.DELIVERIES.labels(outcome="failed").inc()
        return
    delay = backoff_seconds(claim.attempt, settings.delivery_backoff.total_seconds())
    outbox_store.schedule_retry(
        connection,
        claim.delivery_id,
        next_attempt_us=now_us + int(delay * 1_000_000),
        status_code=outcome.status_code,
        error=outcome.error,
    )
    report.retrying += 1
    metrics.DELIVERIES.labels(outcome="retry").inc()


def _pause_reason(settings: Settings, outcome: AttemptResult, failures: int) -> str | None:
    """Why the subscription pauses after this failure, or ``None`` while it keeps going."""
    if outcome.gone:
        return "the receiver answered 410 Gone"
    if failures >= settings.subscription_pause_after:
        return (
            f"{failures} consecutive failed attempts; last: {(outcome.error or '')[:SNIPPET_CHARS]}"
        )
    return None


def _count_subscription_failure(
    connection: Connection,
    settings: Settings,
    claim: Claim,
    outcome: AttemptResult,
    counted: FailureCount | None,
    report: DeliveryReport,
) -> None:
    """One more consecutive failure for the subscription; pause it on ``410 Gone`` or after
    ``subscription_pause_after`` failures in a row (an already paused one stays as it is)."""
    failures = (counted.consecutive_failures if counted else 0) + 1
    reason = None
    if counted is not None and not counted.paused:
        reason = _pause_reason(settings, outcome, failures)
        if reason is not None:
            report.paused.append(claim.subscription_id)
            log.warning(
                "webhook subscription paused",
                extra={"fields": {"subscription": claim.subscription_id, "failures": failures}},
            )
    subscription_store.record_failures(
        connection, claim.subscription_id, consecutive_failures=failures, pause_reason=reason
    )


def release(engine: Engine, claim: Claim, now_us: int) -> None:
    """Give a claimed delivery back unsent: attempt count and due time as before the claim."""
    with write_transaction(engine) as connection:
        outbox_store.release_claim(
            connection, claim.delivery_id, attempt=claim.attempt, now_us=now_us
        )


def deliver_due(
    engine: Engine,
    settings: Settings,
    now_us: int | None = None,
    *,
    resolver: Resolver | None = None,
) -> DeliveryReport:
    """Send every delivery due at ``now_us`` (default: now); the scheduler calls this each tick.

    ``now_us`` drives scheduling (what is due, backoff, rotation overlap); the
    ``webhook-timestamp`` header is always the wall clock at the moment of sending, because
    receivers compare it with their own clock. ``resolver`` replaces ``socket.getaddrinfo``.
    """
    now_us = now_micros() if now_us is None else now_us
    report = DeliveryReport()
    claims = claim_due(engine, settings, now_us)
    if not claims:
        return report
    report.attempted = len(claims)
    recording = threading.Lock()  # one recorder at a time: the report is shared
    with make_client(settings) as client:

        def attempt(claim: Claim) -> None:
            if claim.subscription_id in report.paused:  # paused earlier in this run (410...)
                release(engine, claim, now_us)
                return
            outcome = send_one(claim, settings, client, resolver)
            with recording:
                record_attempt(engine, settings, claim, outcome, now_us, report)
            log.info(
                "webhook attempt",
                extra={
                    "fields": {
                        "delivery": claim.delivery_id,
                        "subscription": claim.subscription_id,
                        "attempt": claim.attempt,
                        "status_code": outcome.status_code,
                        "ok": outcome.ok,
                        "duration_ms": outcome.duration_ms,
                    }
                },
            )

        workers = max(1, min(settings.delivery_concurrency, len(claims)))
        if workers == 1:
            for claim in claims:
                attempt(claim)
        else:
            with ThreadPoolExecutor(workers, thread_name_prefix="rolewatch-deliver") as pool:
                list(pool.map(attempt, claims))
    return report
