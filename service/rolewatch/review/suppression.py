"""Suppression rules: which accounts never raise an alert, and the pattern language.

An entry is either an exact ``account`` id or an id ``pattern``. Patterns are shell-style
globs matched against the whole account id, case-sensitively (Python's
``fnmatch.fnmatchcase``):

- ``*`` matches any run of characters, including none;
- ``?`` matches exactly one character;
- ``[abc]`` matches one of the listed characters, ``[a-f]`` one in the range, ``[!abc]``
  one character not listed;
- everything else matches itself. To match a literal ``*``, ``?`` or ``[``, put it in
  brackets: ``[*]``, ``[?]``, ``[[]``.

So ``official-*`` covers ``official-help`` and ``official-news``; ``shop-??`` covers
``shop-01`` but not ``shop-001``. A pattern made only of ``*`` and ``?`` is refused: it
would silence nearly every account. Pure rules; the entries live in
:mod:`rolewatch.store.suppressions`.
"""

from __future__ import annotations

import fnmatch
import re
from collections.abc import Iterable
from dataclasses import dataclass

from rolewatch.store.schema import MAX_ACCOUNT_CHARS

KINDS = ("account", "pattern")
MAX_REASON = 500


class SuppressionError(ValueError):
    """An entry cannot be stored as given; the message says what to change."""


@dataclass(frozen=True)
class Rule:
    """One active entry: its id, kind and value."""

    id: int
    kind: str
    value: str


def check_entry(kind: str, value: str, reason: str) -> tuple[str, str]:
    """The entry's value and reason, checked; :class:`SuppressionError` otherwise."""
    if kind not in KINDS:
        raise SuppressionError(f"kind must be account or pattern, not {kind!r}")
    if not value or len(value) > MAX_ACCOUNT_CHARS:
        raise SuppressionError(f"the {kind} needs 1 to {MAX_ACCOUNT_CHARS} characters")
    if any(ord(ch) < 32 or ord(ch) == 127 for ch in value):
        raise SuppressionError(f"the {kind} must not hold control characters")
    if kind == "pattern" and not value.strip("*?"):
        raise SuppressionError(
            "a pattern of only * and ? would silence nearly every account; name part of the "
            "id, like official-*"
        )
    reason = reason.strip()
    if not reason or len(reason) > MAX_REASON:
        raise SuppressionError(f"a suppression needs a reason of 1 to {MAX_REASON} characters")
    if any(ord(ch) < 32 and ch not in "\n\t" or ord(ch) == 127 for ch in reason):
        raise SuppressionError("the reason must not hold control characters")
    return value, reason


class Matcher:
    """The active rules, ready to test account ids: exact ids by lookup, patterns compiled
    once. ``match`` returns the id of the first (oldest) rule that covers the account."""

    def __init__(self, rules: Iterable[Rule]) -> None:
        ordered = sorted(rules, key=lambda rule: rule.id)
        self._exact: dict[str, int] = {}
        for rule in ordered:
            if rule.kind == "account":
                self._exact.setdefault(rule.value, rule.id)
        self._patterns = [
            (rule.id, re.compile(fnmatch.translate(rule.value)))
            for rule in ordered
            if rule.kind == "pattern"
        ]

    def match(self, account: str) -> int | None:
        found = [self._exact[account]] if account in self._exact else []
        found += [rule_id for rule_id, regex in self._patterns if regex.match(account)]
        return min(found) if found else None


def covers(kind: str, value: str, account: str) -> bool:
    """True when the entry ``(kind, value)`` covers ``account``."""
    if kind == "account":
        return value == account
    return fnmatch.fnmatchcase(account, value)
