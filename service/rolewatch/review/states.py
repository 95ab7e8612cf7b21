"""The review states of a case, the moves between them, and the fixed list of reasons.

::

    open ──▶ in_review ──▶ confirmed
      │  ◀──(release)│  └─▶ dismissed (reason required)
      ├──────────────┼──▶ confirmed / dismissed (a decision straight from open)
    confirmed / dismissed ──(reopen)──▶ open

A dismissal names one reason from :data:`DISMISS_REASONS` (``other`` needs a free-text
explanation); every decision may carry free text. A dismissed case is also reopened by the
window close when a new alert scores clearly higher (see :mod:`rolewatch.review.grouping`).
Pure rules: no storage, no clock.
"""

from __future__ import annotations

from dataclasses import dataclass

OPEN = "open"
IN_REVIEW = "in_review"
CONFIRMED = "confirmed"
DISMISSED = "dismissed"
STATES = (OPEN, IN_REVIEW, CONFIRMED, DISMISSED)
DECIDED = (CONFIRMED, DISMISSED)
STATE_LABELS = {
    OPEN: "open",
    IN_REVIEW: "in review",
    CONFIRMED: "confirmed",
    DISMISSED: "dismissed",
}

DISMISS_REASONS = {
    "expected_behaviour": "expected behaviour",
    "known_account": "known account",
    "data_problem": "data problem",
    "duplicate": "duplicate",
    "other": "other (explained in the text)",
}
MAX_TEXT = 2000

# The states a case may move to from each state.
MOVES: dict[str, tuple[str, ...]] = {
    OPEN: (IN_REVIEW, CONFIRMED, DISMISSED),
    IN_REVIEW: (OPEN, CONFIRMED, DISMISSED),
    CONFIRMED: (OPEN,),
    DISMISSED: (OPEN,),
}


class ReviewRuleError(ValueError):
    """A requested change breaks a review rule; the message says what is allowed."""


@dataclass(frozen=True)
class StateChange:
    """A checked move: the new state, the reason (dismissals only) and the free text."""

    from_state: str
    to_state: str
    reason: str | None
    text: str | None

    @property
    def is_decision(self) -> bool:
        return self.to_state in DECIDED

    @property
    def is_reopen(self) -> bool:
        return self.from_state in DECIDED and self.to_state == OPEN


def clean_text(text: str | None) -> str | None:
    """Free text with outer spaces removed (None when empty); too long text, or control
    characters other than line breaks and tabs, are refused."""
    text = (text or "").strip()
    if not text:
        return None
    if len(text) > MAX_TEXT:
        raise ReviewRuleError(f"the text is {len(text)} characters; keep it under {MAX_TEXT}")
    if any((ord(ch) < 32 and ch not in "\n\r\t") or 127 <= ord(ch) < 160 for ch in text):
        raise ReviewRuleError("the text holds control characters; remove them")
    return text


def check_move(current: str, wanted: str, reason: str | None, text: str | None) -> StateChange:
    """Check a move from ``current`` to ``wanted``; raise :class:`ReviewRuleError` with the
    allowed moves, or about a missing or unknown reason."""
    if wanted not in STATES:
        raise ReviewRuleError(f"unknown state {wanted!r}; states are {', '.join(STATES)}")
    if wanted == current:
        raise ReviewRuleError(f"the case is already {STATE_LABELS[current]}")
    allowed = MOVES[current]
    if wanted not in allowed:
        raise ReviewRuleError(
            f"a {STATE_LABELS[current]} case can move to {' or '.join(allowed)}, "
            f"not {wanted}" + ("; reopen it first" if current in DECIDED else "")
        )
    text = clean_text(text)
    if wanted == DISMISSED:
        if reason not in DISMISS_REASONS:
            raise ReviewRuleError(
                "dismissing needs a reason, one of: " + ", ".join(DISMISS_REASONS)
            )
        if reason == "other" and not text:
            raise ReviewRuleError("the reason 'other' needs a text saying why")
    elif reason is not None:
        raise ReviewRuleError("a reason is given only when dismissing a case")
    return StateChange(current, wanted, reason if wanted == DISMISSED else None, text)
