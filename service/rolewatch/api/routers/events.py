"""POST /v1/events: a batch of events as JSON (``{"events": [...]}``), NDJSON, or CloudEvents
(structured or batched, see :mod:`rolewatch.api.cloudevents`).

The whole batch is refused, with nothing stored, when it is too large (413: more than
``max_batch_events`` events or ``max_batch_bytes`` bytes, checked on Content-Length and again
while reading the body), not UTF-8 or not parseable at all (400), or of another content type
(415). Otherwise each event is validated on its own: 202 with the counts and the rejected
events' indexes and reasons. For NDJSON the index counts non-blank lines from 0, and a line
that is not JSON is rejected alone.
"""

from __future__ import annotations

import json
import logging
from typing import Any

import orjson
from fastapi import APIRouter, HTTPException, Request, Response, status
from starlette.concurrency import run_in_threadpool

from rolewatch.api import cloudevents
from rolewatch.api.deps import IngestKey, SettingsDep, StoreDep
from rolewatch.api.models import EventBatch, IngestResponse, Problem
from rolewatch.clock import now_micros
from rolewatch.store.events import InvalidEvent, ingest

router = APIRouter(tags=["events"])
log = logging.getLogger(__name__)

JSON_TYPES = ("application/json",)
NDJSON_TYPES = ("application/x-ndjson", "application/ndjson", "application/jsonl")
ACCEPTED_TYPES = (*JSON_TYPES, *NDJSON_TYPES, cloudevents.STRUCTURED, cloudevents.BATCH)


def _inlined(schema: dict[str, Any]) -> dict[str, Any]:
    """``schema`` with its ``#/$defs/...`` references replaced by the definitions, so it can
    sit inside the OpenAPI document."""
    definitions = schema.pop("$defs", {})

    def resolve(node: Any) -> Any:
        if isinstance(node, dict):
            reference = node.get("$ref")
            if isinstance(reference, str) and reference.startswith("#/$defs/"):
                return resolve(definitions[reference.removeprefix("#/$defs/")])
            return {key: resolve(value) for key, value in node.items()}
        if isinstance(node, list):
            return [resolve(item) for item in node]
        return node

    return resolve(schema)


_OPENAPI = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": _inlined(EventBatch.model_json_schema())},
            "application/x-ndjson": {
                "schema": {"type": "string", "description": "One event object per line."}
            },
            cloudevents.STRUCTURED: {
                "schema": {
                    "type": "object",
                    "description": "One CloudEvent (v1.0, JSON format); mapping in README.md.",
                }
            },
            cloudevents.BATCH: {
                "schema": {
                    "type": "array",
                    "items": {"type": "object"},
                    "description": "CloudEvents (v1.0, JSON batch format); mapping in README.",
                }
            },
        },
    }
}


def _too_large(message: str) -> HTTPException:
    return HTTPException(
        status.HTTP_413_CONTENT_TOO_LARGE, detail=message + "; nothing was stored: split the batch"
    )


def _bad(message: str) -> HTTPException:
    return HTTPException(status.HTTP_400_BAD_REQUEST, detail=message + "; nothing was stored")


async def _read_body(request: Request, max_bytes: int) -> bytes:
    declared = request.headers.get("content-length")
    if declared is not None:
        try:
            declared_bytes = int(declared)
        except ValueError:
            raise _bad("Content-Length is not a number") from None
        if declared_bytes > max_bytes:
            raise _too_large(f"the body has {declared_bytes} bytes, at most {max_bytes} allowed")
    chunks = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > max_bytes:
            raise _too_large(f"the body has more than {max_bytes} bytes allowed")
        chunks.append(chunk)
    return b"".join(chunks)


def _utf8_problem(body: bytes) -> str | None:
    try:
        body.decode("utf-8")
    except UnicodeDecodeError as error:
        return f"the body is not valid UTF-8 (byte {error.start})"
    return None


def _top_level_keys(pairs: list[tuple[str, Any]]) -> list[tuple[str, Any]]:
    return pairs  # keeps repeated keys, which a dict would merge


def _repeated_top_level_key(body: bytes) -> str | None:
    """A key the body's top-level object names twice, or None.

    JSON parsers keep only the last of repeated keys (RFC 8259 section 4 leaves it open), so
    ``{"events": [...], "events": [...]}`` would silently lose the first list. A second
    ``events`` key needs either the literal ``"events"`` twice or a ``\\u`` escape, so the
    slower check runs only on such bodies.
    """
    if body.count(b'"events"') < 2 and b"\\u" not in body:
        return None
    try:
        pairs = json.loads(body, object_pairs_hook=_top_level_keys)
    except (ValueError, RecursionError):
        return None  # the caller's parse reports what is wrong
    if not isinstance(pairs, list) or not all(isinstance(p, tuple) for p in pairs):
        return None
    names = [name for name, _ in pairs]
    return next((name for name in names if names.count(name) > 1), None)


def _load_json(body: bytes) -> Any:
    """The parsed body; HTTPException 400 when it is not UTF-8 JSON."""
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError:
        problem = _utf8_problem(body)
        if problem:
            raise _bad(problem) from None
        try:  # the standard library also reads NaN/Infinity and huge integers, which then
            return json.loads(body)  # get a per-event reason instead of failing the batch
        except RecursionError:
            raise _bad("the body is nested too deeply") from None
        except ValueError as error:
            raise _bad(f"the body is not valid JSON: {error}") from None


def parse_json_batch(body: bytes, max_events: int) -> list:
    """``{"events": [...]}`` → the list of raw events; HTTPException 400/413 otherwise."""
    document = _load_json(body)
    if not isinstance(document, dict) or not isinstance(document.get("events"), list):
        raise _bad('the body must be a JSON object {"events": [...]}')
    repeated = _repeated_top_level_key(body)
    if repeated is not None:
        raise _bad(f"the key {repeated!r} appears more than once; name events once")
    extra = sorted(set(document) - {"events"})
    if extra:
        raise _bad(f'unexpected field {extra[0]!r} beside "events"')
    events = document["events"]
    if len(events) > max_events:
        raise _too_large(f"the batch has {len(events)} events, at most {max_events} allowed")
    return events


def parse_cloudevents(body: bytes, media: str, max_events: int) -> list:
    """A structured or batched CloudEvents body → mapped events (see api/cloudevents.py)."""
    mapped = cloudevents.interactions(_load_json(body), media)
    if isinstance(mapped, str):
        raise _bad(mapped)
    if len(mapped) > max_events:
        raise _too_large(f"the batch has {len(mapped)} events, at most {max_events} allowed")
    return mapped


def parse_ndjson_batch(body: bytes, max_events: int) -> list:
    """One JSON event per line → raw events; a line that is not JSON becomes an InvalidEvent."""
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as error:
        raise _bad(f"the body is not valid UTF-8 (byte {error.start})") from None
    # Split on "\n" only: str.splitlines would also cut at U+2028 or U+0085, which JSON
    # strings may hold unescaped.
    lines = [line for line in text.split("\n") if line.strip()]
    if len(lines) > max_events:
        raise _too_large(f"the batch has {len(lines)} events, at most {max_events} allowed")
    events: list = []
    for number, line in enumerate(lines):
        try:
            events.append(orjson.loads(line))
        except orjson.JSONDecodeError:
            try:
                events.append(json.loads(line))
            except RecursionError:
                events.append(InvalidEvent(f"event {number} is nested too deeply"))
            except ValueError as error:
                events.append(InvalidEvent(f"event {number} is not valid JSON: {error}"))
    return events


@router.post(
    "/v1/events",
    status_code=status.HTTP_202_ACCEPTED,
    response_model=IngestResponse,
    summary="Post a batch of interaction events",
    responses={
        400: {"model": Problem, "description": 'Not UTF-8, not JSON, or not {"events": [...]}.'},
        401: {"model": Problem},
        403: {"model": Problem},
        413: {"model": Problem, "description": "Too many events or bytes."},
        415: {"model": Problem, "description": "Not JSON, NDJSON or CloudEvents JSON."},
    },
    openapi_extra=_OPENAPI,
)
async def post_events(
    request: Request, store: StoreDep, settings: SettingsDep, _key: IngestKey
) -> Response:
    """Store a batch: JSON ``{"events": [...]}`` or NDJSON. Idempotent on event id."""
    content_type = request.headers.get("content-type", "")
    media, _, params = content_type.partition(";")
    media = media.strip().lower()
    charset = params.strip().lower()
    if charset.startswith("charset=") and charset[8:].strip('"') not in ("utf-8", "utf8"):
        raise HTTPException(
            status.HTTP_415_UNSUPPORTED_MEDIA_TYPE, detail="only UTF-8 bodies are accepted"
        )
    if "ce-specversion" in request.headers:
        raise HTTPException(
            status.HTTP_415_UNSUPPORTED_MEDIA_TYPE,
            detail="CloudEvents binary content mode (ce- headers) is not read: send the event "
            f"in structured mode ({cloudevents.STRUCTURED}) or a batch ({cloudevents.BATCH})",
        )
    if media not in ACCEPTED_TYPES:
        raise HTTPException(
            status.HTTP_415_UNSUPPORTED_MEDIA_TYPE,
            detail=f"content type {media or '(none)'!r} is not accepted: send application/json "
            '({"events": [...]}), application/x-ndjson (one event per line) or CloudEvents '
            f"({cloudevents.STRUCTURED}, {cloudevents.BATCH})",
        )
    body = await _read_body(request, settings.max_batch_bytes)
    if media in JSON_TYPES:
        raw_events = parse_json_batch(body, settings.max_batch_events)
    elif media in NDJSON_TYPES:
        raw_events = parse_ndjson_batch(body, settings.max_batch_events)
    else:
        raw_events = parse_cloudevents(body, media, settings.max_batch_events)
    now_us = now_micros()
    result = await run_in_threadpool(ingest, store, settings, raw_events, now_us)
    log.debug(
        "batch ingested",
        extra={
            "fields": {
                "accepted": result.accepted,
                "duplicates": result.duplicates,
                "late": result.late,
                "rejected": len(result.rejected),
            }
        },
    )
    return Response(
        orjson.dumps(result.to_dict()),
        status_code=status.HTTP_202_ACCEPTED,
        media_type="application/json",
    )
