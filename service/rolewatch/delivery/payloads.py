"""Webhook bodies: ``json`` (the alert in its API form) and ``text`` (a chat-ready summary).

Bodies are built once, when a delivery is queued, and stored as the exact bytes to send, so
every retry carries identical bytes under the same ``webhook-id``.

The ``text`` form goes to chat channels, where account ids and role names are *data*: they
must never become mentions, channel pings or links. Every value taken from the alert has its
control characters removed, ``@`` replaced by the full-width ``＠`` and angle brackets by
``‹ ›`` (chat markup such as ``<!channel>`` or ``<@U123>`` needs them). The account id
keeps every other character, in a Markdown code span, with each character a reader could miss
written as ``‹U+XXXX›`` (:mod:`rolewatch.delivery.markdown`): two ids that look alike must
not read the same.
"""

from __future__ import annotations

import json
import re
import unicodedata
from typing import Any
from urllib.parse import quote

from rolewatch.clock import to_rfc3339
from rolewatch.delivery.markdown import account_code

ALERT_RAISED = "alert.raised"
ALERT_TEST = "alert.test"
TEXT_LIMIT = 2000
REVIEW_LINE = "This is a lead for human review, not a verdict."

_MARKUP = str.maketrans({"@": "\uff20", "<": "\u2039", ">": "\u203a"})
_SPACES = re.compile(r"\s+")


def json_body(alert: dict[str, Any], event_type: str, timestamp_us: int) -> bytes:
    """The ``json`` format: ``{"type", "timestamp", "data": <alert>}`` as compact UTF-8."""
    document = {"type": event_type, "timestamp": to_rfc3339(timestamp_us), "data": alert}
    return json.dumps(document, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def plain(value: Any, limit: int = 120) -> str:
    """A data value made safe for chat text: one line, no controls, no mentions or markup."""
    text = "" if value is None else str(value)
    text = "".join(
        " " if unicodedata.category(ch) in ("Cc", "Zl", "Zp") else ch
        for ch in text
        if unicodedata.category(ch) != "Cf"  # zero-width and direction-override characters
    )
    text = _SPACES.sub(" ", text).strip().translate(_MARKUP)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def safe_link(url: Any) -> str:
    """A link with characters chat markup could abuse percent-encoded (``@``, ``<``, ``>``...)."""
    text = "".join(ch for ch in str(url or "") if unicodedata.category(ch)[0] != "C")
    return quote(text, safe=":/?#[]!$&'()*+,;=%-._~")


def _number(value: Any) -> str:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return f"{value:.3g}" if isinstance(value, float) else str(value)
    return plain(value, 20)


def _role(role: Any) -> str:
    if isinstance(role, dict):
        name = role.get("name")
        return plain(name, 60) if name else f"role {plain(role.get('id'), 12)}"
    return "no earlier role"


def headline(alert: dict[str, Any]) -> str:
    """The alert's headline (what changed, docs/CONTRACTS.md "Alert"), or the two roles for
    an alert form without one."""
    text = alert.get("headline")
    if isinstance(text, str) and text:
        return plain(text, 300)
    return f"{_role(alert.get('role_before'))} → {_role(alert.get('role_after'))}"


def text_summary(
    alert: dict[str, Any], event_type: str = ALERT_RAISED, case_url: str | None = None
) -> str:
    """A short human summary of ``alert`` for chat channels (under ``TEXT_LIMIT`` characters);
    ``case_url`` links the review case the alert was filed into."""
    evidence = alert.get("evidence") or {}
    lines = []
    if event_type == ALERT_TEST:
        lines.append("TEST — a test message from rolewatch; no account changed role.")
    lines.append(f"Role change for account {account_code(alert.get('account'), _MARKUP)}")
    window = ""
    if alert.get("window_start") and alert.get("window_end"):
        window = f" (window {plain(alert['window_start'], 40)} to {plain(alert['window_end'], 40)})"
    lines.append(headline(alert))
    lines.append(f"Score {_number(alert.get('score'))}{window}")
    if evidence.get("page_url"):
        lines.append(f"Details: {safe_link(evidence['page_url'])}")
    if case_url:
        lines.append(f"Case: {safe_link(case_url)}")
    lines.append(REVIEW_LINE)
    text = "\n".join(lines)
    if len(text) > TEXT_LIMIT:  # only if the parts above grew; keep the review line
        text = text[: TEXT_LIMIT - len(REVIEW_LINE) - 2] + "…\n" + REVIEW_LINE
    return text


def text_body(
    alert: dict[str, Any], event_type: str = ALERT_RAISED, case_url: str | None = None
) -> bytes:
    """The ``text`` format: ``{"text": <summary>}`` as UTF-8 JSON."""
    document = {"text": text_summary(alert, event_type, case_url)}
    return json.dumps(document, ensure_ascii=False, separators=(",", ":")).encode("utf-8")


def build_body(
    fmt: str,
    alert: dict[str, Any],
    event_type: str,
    timestamp_us: int,
    *,
    case_url: str | None = None,
) -> bytes:
    """The body bytes of one delivery in the subscription's format (``case_url``: the text
    format links the alert's case)."""
    if fmt == "text":
        return text_body(alert, event_type, case_url)
    if fmt == "json":
        return json_body(alert, event_type, timestamp_us)
    raise ValueError(f"unknown webhook format {fmt!r}: use json or text")
