"""The review rules on their own: the state moves, where a new alert goes, and the suppression
pattern language checked against the shell's own pattern matching (bash ``case``, which
implements POSIX.1-2017 "Shell Command Language" 2.13, Pattern Matching Notation)."""

from __future__ import annotations

import shutil
import subprocess

import pytest

from rolewatch.review.grouping import GroupingRule, LatestCase, Placement, place_alert
from rolewatch.review.states import MOVES, STATES, ReviewRuleError, check_move
from rolewatch.review.suppression import Matcher, Rule, SuppressionError, check_entry

WEEK_US = 7 * 86_400 * 1_000_000


@pytest.mark.parametrize("current", STATES)
@pytest.mark.parametrize("wanted", STATES)
def test_every_move_is_either_allowed_or_refused_with_a_reason(current, wanted):
    reason = "duplicate" if wanted == "dismissed" else None
    if wanted in MOVES[current]:
        move = check_move(current, wanted, reason, "  why  ")
        assert (move.from_state, move.to_state, move.text) == (current, wanted, "why")
        assert move.is_decision == (wanted in ("confirmed", "dismissed"))
        assert move.is_reopen == (current in ("confirmed", "dismissed") and wanted == "open")
    else:
        with pytest.raises(ReviewRuleError):
            check_move(current, wanted, reason, None)


def test_dismissing_needs_a_known_reason_and_other_needs_text():
    with pytest.raises(ReviewRuleError, match="needs a reason"):
        check_move("open", "dismissed", None, None)
    with pytest.raises(ReviewRuleError, match="needs a reason"):
        check_move("open", "dismissed", "bored", None)
    with pytest.raises(ReviewRuleError, match="needs a text"):
        check_move("open", "dismissed", "other", "  ")
    assert check_move("open", "dismissed", "other", "test traffic").reason == "other"
    with pytest.raises(ReviewRuleError, match="only when dismissing"):
        check_move("open", "confirmed", "duplicate", None)
    with pytest.raises(ReviewRuleError, match="control characters"):
        check_move("open", "confirmed", None, "bad\x00text")


RULE = GroupingRule(group_windows=2, period_us=WEEK_US, reopen_ratio=1.5)


@pytest.mark.parametrize(
    ("state", "windows_later", "dismissed_score", "score", "expected"),
    [
        (None, 1, None, 5.0, Placement.NEW_CASE),  # no case yet
        ("open", 2, None, 5.0, Placement.JOIN),  # at the grouping limit
        ("open", 3, None, 5.0, Placement.NEW_CASE),  # beyond it
        ("in_review", 1, None, 1.0, Placement.JOIN),
        ("confirmed", 1, None, 50.0, Placement.JOIN),  # a confirmed case stays confirmed
        ("dismissed", 1, 6.0, 8.9, Placement.JOIN),  # below 1.5 x 6.0
        ("dismissed", 1, 6.0, 9.0, Placement.REOPEN),  # exactly 1.5 x 6.0
        ("dismissed", 3, 6.0, 90.0, Placement.NEW_CASE),  # too late to join at all
        ("dismissed", 1, 0.0, 0.0, Placement.JOIN),  # not above a zero score
        ("dismissed", 1, -1.0, -0.5, Placement.REOPEN),  # above it, whatever the ratio says
    ],
)
def test_where_a_new_alert_goes(state, windows_later, dismissed_score, score, expected):
    latest = None
    if state is not None:
        latest = LatestCase(1, state, 10 * WEEK_US, dismissed_score)
    assert place_alert(latest, (10 + windows_later) * WEEK_US, score, RULE) is expected


PATTERNS = [
    "official-*",
    "shop-??",
    "[a-c]*",
    "[!m]*",
    "m-0002[0-9]",
    "*-bot",
    "a[*]b",
    "[?]x",
    "*.*",
    "m-00042",
]
IDS = [
    "official-help",
    "official",
    "shop-01",
    "shop-001",
    "a*b",
    "axb",
    "?x",
    "ax",
    "m-00021",
    "m-0002a",
    "b-bot",
    "x.y",
    "m-00042",
    "M-00042",
    "c",
    "marketplace",
    "ünïcode-bot",
]


def _bash_matches(pattern: str, account: str) -> bool:
    """bash's own answer: does ``case`` match ``account`` against the unquoted pattern?"""
    script = 'case "$1" in $2) echo yes;; *) echo no;; esac'
    out = subprocess.run(
        ["bash", "-c", script, "match", account, pattern],
        capture_output=True,
        text=True,
        check=True,
        env={"LC_ALL": "C.UTF-8"},
    )
    return out.stdout.strip() == "yes"


@pytest.mark.skipif(shutil.which("bash") is None, reason="bash is needed as the reference")
@pytest.mark.parametrize("pattern", PATTERNS)
def test_patterns_match_like_the_shell(pattern):
    matcher = Matcher([Rule(7, "pattern", pattern)])
    for account in IDS:
        assert (matcher.match(account) == 7) == _bash_matches(pattern, account), (
            pattern,
            account,
        )


def test_exact_entries_and_the_oldest_rule_wins():
    matcher = Matcher(
        [Rule(5, "pattern", "shop-*"), Rule(3, "account", "shop-*"), Rule(9, "account", "x")]
    )
    assert matcher.match("shop-*") == 3  # an exact entry takes the id literally
    assert matcher.match("shop-1") == 5
    assert matcher.match("x") == 9 and matcher.match("y") is None


@pytest.mark.parametrize(
    ("kind", "value", "reason", "message"),
    [
        ("pattern", "*", "r", "nearly every account"),
        ("pattern", "?*?", "r", "nearly every account"),
        ("regex", "a", "r", "kind"),
        ("account", "", "r", "characters"),
        ("account", "a" * 201, "r", "characters"),
        ("account", "a\tb", "r", "control"),
        ("account", "a", " ", "reason"),
    ],
)
def test_suppression_entries_refused(kind, value, reason, message):
    with pytest.raises(SuppressionError, match=message):
        check_entry(kind, value, reason)
