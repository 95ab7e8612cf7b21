"""Ingest: validate interaction events and store them, idempotently, in one transaction.

This is the one path by which events enter the store: ``POST /v1/events``, ``rolewatch
replay`` and the demo all call :func:`ingest`. Each event is checked on its own; valid events
are stored and invalid ones reported by their index with a readable reason, so bad input
never loses the good input around it. Storing is ``INSERT ... ON CONFLICT (event_id) DO
NOTHING`` with one ``executemany`` per batch, so a retried batch is harmless.

Wire form of an event (README.md "Posting events"; its schema is api.models.Event): ``id``
(optional), ``time`` (RFC 3339 with an offset, required), ``actor`` and ``target``
(different), ``kind`` (optional), ``weight`` (finite number ≥ 0, default 1); the length
limits are the store's column widths (store.schema ``MAX_*_CHARS``).
"""

from __future__ import annotations

import hashlib
import json
import math
import re
import threading
import weakref
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

from sqlalchemy import Table, bindparam, func, select, update
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.engine import Connection, Engine

from rolewatch import metrics
from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.identifiers import plain_ascii, text_problem
from rolewatch.store.conflicts import find_conflicts
from rolewatch.store.db import lock_windows, write_transaction
from rolewatch.store.schema import (
    MAX_ACCOUNT_CHARS,
    MAX_ID_CHARS,
    MAX_KIND_CHARS,
    events,
    service_state,
    windows,
)

FIELDS = ("id", "time", "actor", "target", "kind", "weight")
_FIELD_SET = frozenset(FIELDS)

EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
_ONE_US = timedelta(microseconds=1)
# RFC 3339 section 5.6 date-time; "T" may be written "t" or a space (section 5.6, NOTE).
# Digits are ASCII only (RFC 3339 section 5.6 uses the ABNF DIGIT, %x30-39), so full-width
# and other Unicode digits are refused.
_RFC3339 = re.compile(
    r"([0-9]{4})-([0-9]{2})-([0-9]{2})[Tt ]([0-9]{2}):([0-9]{2}):([0-9]{2})(\.[0-9]{1,9})?"
    r"([Zz]|[+-][0-9]{2}:[0-9]{2})?"
)
_BEFORE_YEAR_ONE = (
    "is before the year 1 in UTC; events must be no older than max_event_age and never "
    "before 1970-01-01T00:00:00Z"
)


class InvalidEvent:
    """Stands for an item that could not even be parsed (an NDJSON line that is not JSON).

    :func:`ingest` reports it under its index with ``message``, like any other invalid event.
    """

    __slots__ = ("message",)

    def __init__(self, message: str) -> None:
        self.message = message


@dataclass
class IngestResult:
    """What happened to one batch: counts, and each rejected event's index and reason."""

    accepted: int = 0
    duplicates: int = 0
    late: int = 0
    rejected: list[dict[str, Any]] = field(default_factory=list)
    conflicts: list[dict[str, Any]] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return {
            "accepted": self.accepted,
            "duplicates": self.duplicates,
            "late": self.late,
            "rejected": self.rejected,
            "conflicts": self.conflicts,
        }


class _Reject(ValueError):
    pass


def parse_time_us(value: Any) -> int:
    """RFC 3339 timestamp with an offset → integer microseconds since the epoch, UTC.

    Raises ``ValueError`` with a readable reason. Digits beyond microseconds are truncated.
    """
    if not isinstance(value, str):
        raise _Reject(
            f"time: must be an RFC 3339 string such as 2026-02-12T09:30:00Z, got {_kind_of(value)}"
        )
    match = _RFC3339.fullmatch(value)
    if match is None:
        raise _Reject(f"time: {_show(value)} is not an RFC 3339 timestamp with offset")
    offset = match.group(8)
    if offset is None:
        raise _Reject(
            f"time: {_show(value)} has no UTC offset; add Z (UTC) or an offset like +01:00"
        )
    try:  # the C parser, once the regular expression has checked the RFC 3339 form
        return (datetime.fromisoformat(value) - EPOCH) // _ONE_US
    except ValueError:
        pass  # lowercase t/z, or an impossible date: the checks below say which
    except OverflowError:  # year 1 with a positive offset: before the year 1 in UTC
        raise _Reject(f"time: {_show(value)} {_BEFORE_YEAR_ONE}") from None
    year, month, day, hour, minute, second = (int(match.group(i)) for i in range(1, 7))
    fraction = match.group(7) or ""
    micro = int((fraction[1:] + "000000")[:6]) if fraction else 0
    if offset in ("Z", "z"):
        tz = UTC
    else:
        sign = 1 if offset[0] == "+" else -1
        hours, minutes = int(offset[1:3]), int(offset[4:6])
        if hours > 23 or minutes > 59:
            raise _Reject(f"time: {_show(value)} has an impossible UTC offset")
        tz = timezone(sign * timedelta(hours=hours, minutes=minutes))
    try:
        moment = datetime(year, month, day, hour, minute, second, micro, tzinfo=tz)
    except ValueError as error:
        raise _Reject(
            f"time: {_show(value)} is not an RFC 3339 timestamp with offset ({error})"
        ) from None
    try:
        return (moment - EPOCH) // _ONE_US
    except OverflowError:
        raise _Reject(f"time: {_show(value)} {_BEFORE_YEAR_ONE}") from None


def _canonical_time(time_us: int) -> str:
    return (EPOCH + timedelta(microseconds=time_us)).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def derived_event_id(time_us: int, actor: str, target: str, kind: str | None, weight: float) -> str:
    """The id of an event sent without one: ``ev_`` + 32 hex chars of a sha256.

    The hash covers the canonical JSON (sorted keys, no spaces, UTF-8) of the other fields with
    the time normalised to UTC microseconds and defaults applied, so the same event written
    with another offset, key order or an explicit default weight gets the same id.
    """
    body = json.dumps(
        {
            "actor": actor,
            "kind": kind,
            "target": target,
            "time": _canonical_time(time_us),
            "weight": float(weight),
        },
        sort_keys=True,
        separators=(",", ":"),
        ensure_ascii=False,
    )
    return "ev_" + hashlib.sha256(body.encode("utf-8")).hexdigest()[:32]


def file_line_event_id(file_digest: str, line: int) -> str:
    """The id of an event read without one from line ``line`` of a replayed file.

    ``ev_`` + 32 hex chars of the sha256 of ``"<file_digest>:<line>"``, where ``file_digest``
    is the hex sha256 of the file's bytes. Two equal lines (the same interaction twice in one
    minute) stay two events, and replaying the same file again gives the same ids, so it
    stores nothing new. (:func:`derived_event_id` would merge equal lines into one event.)
    """
    return "ev_" + hashlib.sha256(f"{file_digest}:{line}".encode("ascii")).hexdigest()[:32]


def _kind_of(value: Any) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "an object"
    return type(value).__name__


def _show(value: str, limit: int = 60) -> str:
    """Quote a client value for an error message, shortened and with controls escaped."""
    text = value if len(value) <= limit else value[:limit] + "…"
    return repr(text)


def _required_text(event: dict, name: str, limit: int) -> str:
    text = _text(event, name, limit)
    if text is None:
        raise _Reject(f"{name}: required")
    return text


def _text(event: dict, name: str, limit: int) -> str | None:
    """The field's text, checked; None when absent."""
    value = event.get(name)
    if value is None:
        return None
    if not isinstance(value, str):
        raise _Reject(f"{name}: must be a string, got {_kind_of(value)}")
    if not value:
        raise _Reject(f"{name}: must not be empty")
    if len(value) > limit:
        raise _Reject(f"{name}: {len(value)} characters, at most {limit} allowed")
    problem = text_problem(value)
    if problem is not None:
        raise _Reject(f"{name}: {problem} (README.md, ingest rules)")
    return value


def _weight(event: dict) -> float:
    value = event.get("weight", 1.0)
    if value is None:
        return 1.0
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise _Reject(f"weight: must be a number, got {_kind_of(value)}")
    try:
        number = float(value)
    except OverflowError:
        raise _Reject("weight: too large") from None
    if not math.isfinite(number):
        raise _Reject(f"weight: must be a finite number, got {value!r}")
    if number < 0:
        raise _Reject(f"weight: must be 0 or more, got {value!r}")
    return number


def _fast_event(event: Any, max_time_us: int, min_time_us: int):
    """The common case of a well-formed event, checked in as few steps as possible.

    Returns the stored tuple, or None when anything is unusual; :func:`validate_event` then
    checks field by field and says what is wrong. It never admits an event the slow path
    would refuse.
    """
    if type(event) is not dict or not _FIELD_SET.issuperset(event):
        return None
    get = event.get
    time_value, actor, target = get("time"), get("actor"), get("target")
    kind, event_id, weight = get("kind"), get("id"), get("weight", 1.0)
    if (
        type(time_value) is not str
        or type(actor) is not str
        or type(target) is not str
        or actor == target
        or not 0 < len(actor) <= MAX_ACCOUNT_CHARS
        or not 0 < len(target) <= MAX_ACCOUNT_CHARS
    ):
        return None
    if not (plain_ascii(actor) and plain_ascii(target)):
        return None
    if kind is not None:
        if type(kind) is not str or not 0 < len(kind) <= MAX_KIND_CHARS or not plain_ascii(kind):
            return None
    if event_id is not None:
        if type(event_id) is not str or not 0 < len(event_id) <= MAX_ID_CHARS:
            return None
        if not plain_ascii(event_id):
            return None
    weight_type = type(weight)
    if weight_type is int:
        if not 0 <= weight < 2**53:
            return None
        weight = float(weight)
    elif weight_type is float:
        if not 0.0 <= weight < math.inf:  # also refuses NaN
            return None
    elif weight is None:
        weight = 1.0
    else:
        return None
    # The two usual forms, "...T10:11:12Z" and "...T10:11:12+01:00", checked by position;
    # anything else (fractions, lowercase, errors) goes through the regular expression.
    tail = time_value[19:]
    if (
        not (
            len(time_value) >= 20
            and time_value[4] == "-"
            and time_value[7] == "-"
            and time_value[10] == "T"
            and time_value[13] == ":"
            and time_value[16] == ":"
            and (tail == "Z" or (len(tail) == 6 and tail[0] in "+-" and tail[3] == ":"))
            and time_value.isascii()
        )
        and _RFC3339.fullmatch(time_value) is None
    ):
        return None
    try:
        moment = datetime.fromisoformat(time_value)
        if moment.tzinfo is None:
            return None
        time_us = (moment - EPOCH) // _ONE_US
    except (ValueError, OverflowError):
        return None
    if not min_time_us <= time_us <= max_time_us:
        return None
    if event_id is None:
        event_id = derived_event_id(time_us, actor, target, kind, weight)
    return event_id, time_us, actor, target, kind, weight


def validate_event(
    event: Any, max_time_us: int, min_time_us: int = 0
) -> tuple[str, int, str, str, str | None, float]:
    """Check one wire event; return ``(event_id, time_us, actor, target, kind, weight)``.

    Times must lie in ``[min_time_us, max_time_us]`` (``min_time_us`` is never before the
    Unix epoch). Raises ``ValueError`` whose message names the field and what is wrong.
    """
    fast = _fast_event(event, max_time_us, min_time_us)
    if fast is not None:
        return fast
    if isinstance(event, InvalidEvent):
        raise _Reject(event.message)
    if not isinstance(event, dict):
        raise _Reject(f"an event must be a JSON object, got {_kind_of(event)}")
    if not _FIELD_SET.issuperset(event):
        unknown = sorted(str(k) for k in event if k not in _FIELD_SET)
        raise _Reject(f"unknown field {_show(unknown[0])}; allowed fields: {', '.join(FIELDS)}")
    time_value = event.get("time")
    if time_value is None:
        raise _Reject("time: required")
    time_us = parse_time_us(time_value)
    actor = _required_text(event, "actor", MAX_ACCOUNT_CHARS)
    target = _required_text(event, "target", MAX_ACCOUNT_CHARS)
    if actor == target:
        raise _Reject(
            f"target: same account as actor ({_show(actor)}); self-interactions are not events"
        )
    kind = _text(event, "kind", MAX_KIND_CHARS)
    weight = _weight(event)
    if time_us > max_time_us:
        raise _Reject(
            f"time: {_show(time_value)} is in the future beyond the allowed clock skew "
            f"(latest accepted now: {to_rfc3339(max_time_us)}); check the sender's clock"
        )
    if time_us < min_time_us:
        raise _Reject(_too_old(time_value, min_time_us))
    event_id = _text(event, "id", MAX_ID_CHARS)
    if event_id is None:
        event_id = derived_event_id(time_us, actor, target, kind, weight)
    return event_id, time_us, actor, target, kind, weight


def _too_old(time_value: str, min_time_us: int) -> str:
    if min_time_us <= 0:
        return f"time: {_show(time_value)} is before 1970-01-01T00:00:00Z, the earliest time kept"
    return (
        f"time: {_show(time_value)} is older than max_event_age allows (oldest accepted now: "
        f"{to_rfc3339(min_time_us)}); to replay older history, raise max_event_age"
    )


def oldest_accepted_us(settings: Settings, now_us: int) -> int:
    """The earliest event time ingest accepts at ``now_us``: ``now - max_event_age``, never
    before the Unix epoch (``max_event_age = 0`` leaves only that floor)."""
    age_us = settings.max_event_age // _ONE_US
    return max(0, now_us - age_us) if age_us > 0 else 0


# The one raw statement left: the batch insert runs on the DBAPI cursor. Measured side by
# side (1,000-event batches, one commit each, 200 batches interleaved, this 2-core machine
# under load): SQLite 27,000 events/s raw against 21,000 through SQLAlchemy Core's
# executemany (22 % fewer); PostgreSQL 15,000 against 13,000 - and Core's executemany
# reports no row count on PostgreSQL (-1), which the duplicate count needs (Core with
# RETURNING: 7,200). Everything else here is Core.
_EVENT_COLUMNS = ("event_id", "time_us", "actor", "target", "kind", "weight", "received_us", "late")
_PARAMSTYLE_MARK = {"sqlite": "?", "postgresql": "%s"}


def _raw_insert_sql(dialect: str) -> str:
    marks = ", ".join([_PARAMSTYLE_MARK[dialect]] * len(_EVENT_COLUMNS))
    return (
        f"INSERT INTO {events.name} ({', '.join(_EVENT_COLUMNS)}) VALUES ({marks}) "
        "ON CONFLICT (event_id) DO NOTHING"
    )


_INSERT_SQL = {dialect: _raw_insert_sql(dialect) for dialect in _PARAMSTYLE_MARK}
_COUNT_LATE = (
    update(windows)
    .where(windows.c.start_us <= bindparam("time_us"), windows.c.end_us > bindparam("time_us"))
    .values(late_count=windows.c.late_count + 1)
)


def _dialect_insert(connection: Connection, table: Table) -> postgresql.Insert | sqlite.Insert:
    """``INSERT`` with the dialect's ``ON CONFLICT`` clauses (SQLite and PostgreSQL)."""
    if connection.dialect.name == "postgresql":
        return postgresql.insert(table)
    return sqlite.insert(table)


def _insert_one(connection: Connection, row: tuple) -> bool:
    """Insert one event row; False when its id was already stored."""
    statement = (
        _dialect_insert(connection, events)
        .on_conflict_do_nothing(index_elements=[events.c.event_id])
        .returning(events.c.seq)  # a row back only when it was inserted
    )
    values = dict(zip(_EVENT_COLUMNS, row, strict=True))
    return connection.execute(statement, values).first() is not None


def _set_last_ingest(connection: Connection, now_us: int) -> None:
    statement = _dialect_insert(connection, service_state).values(
        key="last_ingest_us", value=str(now_us)
    )
    connection.execute(
        statement.on_conflict_do_update(
            index_elements=[service_state.c.key], set_={"value": statement.excluded.value}
        )
    )


def _store(
    connection: Connection, rows: list[tuple], indexes: list[int], now_us: int, result: IngestResult
) -> None:
    """Insert validated rows; the work done here holds the write lock, so it is kept short."""
    lock_windows(connection, exclusive=False)
    closed_end = connection.execute(
        select(func.max(windows.c.end_us)).where(windows.c.status == "closed")
    ).scalar()
    if closed_end is None or min(row[1] for row in rows) >= closed_end:
        on_time = [row + (now_us, False) for row in rows]
        late: list[tuple] = []
    else:
        on_time = [row + (now_us, False) for row in rows if row[1] >= closed_end]
        late = [row + (now_us, True) for row in rows if row[1] < closed_end]
    inserted = 0
    if on_time:
        cursor = connection.connection.cursor()
        try:
            cursor.executemany(_INSERT_SQL[connection.dialect.name], on_time)
            inserted = max(cursor.rowcount, 0)
        finally:
            cursor.close()
    # rare: one statement each, to know which were new
    late_times = [{"time_us": row[1]} for row in late if _insert_one(connection, row)]
    if late_times:
        connection.execute(_COUNT_LATE, late_times)
    _set_last_ingest(connection, now_us)
    result.accepted = inserted + len(late_times)
    result.late = len(late_times)
    if result.accepted < len(rows):  # some ids were stored already: same content or not?
        result.conflicts = find_conflicts(connection, rows, indexes)
    result.duplicates = len(rows) - result.accepted - len(result.conflicts)


class _Job:
    __slots__ = ("rows", "indexes", "now_us", "result", "done", "error")

    def __init__(
        self, rows: list[tuple], indexes: list[int], now_us: int, result: IngestResult
    ) -> None:
        self.rows, self.indexes, self.now_us, self.result = rows, indexes, now_us, result
        self.done = False
        self.error: BaseException | None = None


class _GroupWriter:
    """Group commit: batches that arrive while another is being written share one transaction.

    A caller that finds no write in progress becomes the writer: it takes every waiting batch
    (its own included), stores each with its own counts in one transaction, commits, and wakes
    their callers; the others wait. Every caller returns only after the commit that holds its
    rows, so an acknowledged event is still durable, while concurrent requests pay for one
    commit (one fsync) instead of one each. If a shared transaction fails, each batch is
    retried alone, so one batch's failure never loses another's events.
    """

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self.condition = threading.Condition()
        self.pending: list[_Job] = []
        self.busy = False

    def write(
        self, rows: list[tuple], indexes: list[int], now_us: int, result: IngestResult
    ) -> None:
        job = _Job(rows, indexes, now_us, result)
        with self.condition:
            self.pending.append(job)
            while not job.done and self.busy:
                self.condition.wait()
            if job.done:
                if job.error is not None:
                    raise job.error
                return
            self.busy = True
            group, self.pending = self.pending, []
        try:
            self._write_group(group)
        finally:
            with self.condition:
                for member in group:
                    member.done = True
                self.busy = False
                self.condition.notify_all()
        if job.error is not None:
            raise job.error

    def _write_group(self, group: list[_Job]) -> None:
        try:
            with write_transaction(self.engine) as connection:
                for member in group:
                    _store(connection, member.rows, member.indexes, member.now_us, member.result)
            return
        except Exception as error:
            if len(group) == 1:
                group[0].error = error
                return
        for member in group:  # the shared transaction failed: each batch on its own
            member.result.accepted = member.result.duplicates = member.result.late = 0
            member.result.conflicts = []
            try:
                with write_transaction(self.engine) as connection:
                    _store(connection, member.rows, member.indexes, member.now_us, member.result)
            except Exception as error:
                member.error = error


_WRITERS: weakref.WeakKeyDictionary[Engine, _GroupWriter] = weakref.WeakKeyDictionary()
_WRITERS_LOCK = threading.Lock()


def _group_writer(engine: Engine) -> _GroupWriter:
    with _WRITERS_LOCK:
        writer = _WRITERS.get(engine)
        if writer is None:
            writer = _WRITERS[engine] = _GroupWriter(engine)
        return writer


def ingest(
    engine: Engine, settings: Settings, raw_events: Sequence[Any] | Iterable[Any], now_us: int
) -> IngestResult:
    """Validate ``raw_events`` (parsed wire events) and store the valid ones in one transaction
    (shared with batches arriving at the same moment: see :class:`_GroupWriter`).

    ``now_us`` is the receive time (microseconds, UTC): it bounds the future clock skew,
    is stored as each event's ``received_us`` and becomes ``service_state.last_ingest_us``
    when the batch holds at least one valid event. Returns counts of accepted (newly stored),
    duplicate (id already stored with the same content, or repeated in the batch) and late
    events, the rejected ones as ``{"index": i, "error": "..."}`` in input order, and the
    conflicts (an id already stored with other content; the stored event is kept) in the
    same form.
    """
    result = IngestResult()
    max_time_us = now_us + settings.max_future_skew // _ONE_US
    min_time_us = oldest_accepted_us(settings, now_us)
    rows: list[tuple] = []
    indexes: list[int] = []
    rejected = result.rejected
    for index, event in enumerate(raw_events):
        try:
            rows.append(validate_event(event, max_time_us, min_time_us))
            indexes.append(index)
        except _Reject as error:
            rejected.append({"index": index, "error": str(error)})
    if rows:
        _group_writer(engine).write(rows, indexes, now_us, result)
        metrics.EVENTS_ACCEPTED.inc(result.accepted)
        metrics.EVENTS_DUPLICATE.inc(result.duplicates)
        metrics.EVENTS_LATE.inc(result.late)
        metrics.LAST_INGEST.set(now_us / 1e6)
    metrics.EVENTS_REJECTED.inc(len(rejected))
    metrics.INGEST_BATCHES.inc()
    return result
