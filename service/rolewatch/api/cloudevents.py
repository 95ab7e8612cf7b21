"""CloudEvents ingest: events posted as CloudEvents v1.0 become interaction events.

Two content modes of the CloudEvents HTTP binding (v1.0.2, section 3.2) are read on
``POST /v1/events``: *structured* (``application/cloudevents+json``, one event per request)
and *batched* (``application/cloudevents-batch+json``, a JSON array of events), both in the
JSON event format (v1.0.2). The *binary* mode (attributes in ``ce-`` headers) is refused.

The mapping (README.md, "CloudEvents"):

=================================  ===============================================
CloudEvents                        interaction event
=================================  ===============================================
``source`` + ``id``                ``id``: ``ce_`` + 32 hex characters of a sha256 of
                                   both, since only the pair is unique (spec 3.1)
``time``                           ``time`` (required here; optional in the spec)
``data.actor``, else ``subject``   ``actor``
``data.target``                    ``target``
``type``                           ``kind``
``data.weight``                    ``weight`` (default 1)
=================================  ===============================================

``specversion`` must be ``1.0``; ``data`` must be a JSON object (``datacontenttype`` absent
or a JSON type); other attributes and extensions are ignored. Each event is then checked by
the same rules as any other (:mod:`rolewatch.store.events`), and one that cannot be mapped
is rejected alone, with its index and reason.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from rolewatch.store.events import InvalidEvent

STRUCTURED = "application/cloudevents+json"
BATCH = "application/cloudevents-batch+json"
SPEC_VERSION = "1.0"
_REQUIRED = ("id", "source", "specversion", "type")  # spec v1.0.2, section 3.1


def event_id(source: str, ce_id: str) -> str:
    """The stored id of the CloudEvent ``(source, id)``: ``ce_`` + 32 hex characters of the
    sha256 of the JSON array ``[source, id]`` (UTF-8, no spaces)."""
    pair = json.dumps([source, ce_id], ensure_ascii=False, separators=(",", ":"))
    return "ce_" + hashlib.sha256(pair.encode("utf-8")).hexdigest()[:32]


def _json_type(content_type: Any) -> bool:
    media = str(content_type).split(";", 1)[0].strip().lower()
    return media == "application/json" or media.endswith("+json") or media == "text/json"


def _problem(event: dict) -> str | None:
    """Why ``event`` cannot be mapped (the reason names the CloudEvents attribute), or None."""
    for name in _REQUIRED:
        value = event.get(name)
        if not isinstance(value, str) or not value:
            return f"CloudEvents attribute {name}: required, a non-empty string"
    if event["specversion"] != SPEC_VERSION:
        return f"CloudEvents specversion {event['specversion']!r} is not read: send 1.0"
    if "data_base64" in event:
        return "CloudEvents data_base64 (binary data) is not read: send data as a JSON object"
    if "datacontenttype" in event and not _json_type(event["datacontenttype"]):
        return "CloudEvents datacontenttype must be a JSON type, such as application/json"
    if not isinstance(event.get("data", {}), dict):
        return "CloudEvents data must be a JSON object holding actor, target and weight"
    return None


def to_interaction(item: Any, index: int) -> dict[str, Any] | InvalidEvent:
    """One parsed CloudEvent as an interaction event, or the reason it cannot be one."""
    if not isinstance(item, dict):
        return InvalidEvent(f"event {index}: a CloudEvent must be a JSON object")
    problem = _problem(item)
    if problem is not None:
        return InvalidEvent(problem)
    data = item.get("data") or {}
    actor = data.get("actor", item.get("subject"))
    if actor is None:
        return InvalidEvent("actor: required; send it as data.actor or as the subject attribute")
    mapped = {
        "id": event_id(item["source"], item["id"]),
        "time": item.get("time"),
        "actor": actor,
        "target": data.get("target"),
        "kind": item["type"],
    }
    if "weight" in data:
        mapped["weight"] = data["weight"]
    return mapped


def interactions(document: Any, media: str) -> list[dict[str, Any] | InvalidEvent] | str:
    """The events of a structured (one object) or batched (an array) body, mapped; or the
    reason the whole body is refused."""
    if media == STRUCTURED:
        if not isinstance(document, dict):
            return "a structured CloudEvent body must be one JSON object"
        return [to_interaction(document, 0)]
    if not isinstance(document, list):
        return "a CloudEvents batch body must be a JSON array of events"
    return [to_interaction(item, index) for index, item in enumerate(document)]
