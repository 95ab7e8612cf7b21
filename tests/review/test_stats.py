"""The review figures against a hand-counted fixture, read over real HTTP (JSON and CSV), on
SQLite and PostgreSQL.

The decisions are made through ``rolewatch.review.cases.change_case`` (the function behind
``PATCH /v1/cases/{id}``) with explicit times, so the times to review are exact.

The fixture (case_group_windows=2, case_reopen_ratio=1.5; window k closes at C_k = its end
+ 1 h; a suppression covers ``official-*``)::

    window 0: a1 m-p 6.0 (1→2)   a2 m-q 5.0 (1→2)   a3 m-r 7.0 (none→3)
              held back: official-1 (2→3)
    window 1: a4 m-p 6.5 (2→3, joins m-p's case)    a5 m-s 4.5 (1→2)
              held back: official-1 (3→2), official-2 (1→2)
    window 2: a6 m-q 5.2 (1→2, joins m-q's dismissed case; 5.2 < 1.5 × 5.0, stays dismissed)
              a7 m-t 4.2 (2→3)   a8 m-u 6.0 (1→2)

    decisions: m-p confirmed at C0+2h          → a1 confirmed, 2 h = 7,200 s
               m-q dismissed (expected) C0+4h  → a2 dismissed, 4 h = 14,400 s
               m-s in review C1+30min, confirmed C1+1h → a5 confirmed, 1 h = 3,600 s
               m-r dismissed (data problem) C1+10h → a3, 7 d 10 h = 640,800 s
               m-u dismissed (duplicate) C2+1h, reopened C2+2h → a8 undecided
               a4, a6 take their case's standing decision: reviewed, but no time to review
               a7 undecided

Hand counts:

    totals:  raised 8, suppressed 3, reviewed 6 (a1-a6), confirmed 3 (a1 a4 a5),
             dismissed 3 (a2 a3 a6: expected 2, data problem 1),
             median of {3600, 7200, 14400, 640800} = (7200 + 14400) / 2 = 10800 s,
             precision 3 / 6 = 0.5
    window 0: raised 3, suppressed 1, reviewed 3, confirmed 1, dismissed 2 (expected 1,
             data problem 1), median of {7200, 14400, 640800} = 14400, precision 1/3
    window 1: raised 2, suppressed 2, reviewed 2, confirmed 2, dismissed 0, median of {3600}
             = 3600 (a4 has no time), precision 1
    window 2: raised 3, suppressed 0, reviewed 1 (a6), confirmed 0, dismissed 1 (expected),
             median none (a6 has no time), precision 0
    role 1 → role 2: raised 5 (a1 a2 a5 a6 a8), suppressed 1, reviewed 4, confirmed 2,
             dismissed 2 (expected 2), median of {3600, 7200, 14400} = 7200, precision 0.5
    role 2 → role 3: raised 2 (a4 a7), suppressed 1, reviewed 1, confirmed 1, median none,
             precision 1
    no baseline → role 3: raised 1 (a3), reviewed 1, dismissed 1 (data problem),
             median 640800, precision 0
    role 3 → role 2: raised 0, suppressed 1, nothing reviewed
"""

from __future__ import annotations

import csv
import io

from rolewatch.review import cases
from rolewatch.store.keys import verify_key

from .conftest import FIRST_END_US, WEEK_US, file_window, new_alert

HOUR_US = 3_600_000_000
REASONS = ["expected_behaviour", "known_account", "data_problem", "duplicate", "other"]


def _close(k: int) -> int:
    return FIRST_END_US + k * WEEK_US + HOUR_US


def _decide(live, who: str, account: str, at_us: int, **change) -> None:
    key = verify_key(live.engine, live.keys[who])
    (case,) = cases.account_cases(live.engine, live.settings, account)[:1]
    cases.change_case(
        live.engine,
        live.settings,
        case["id"],
        key,
        cases.CaseChange(version=case["version"], **change),
        now_us=at_us,
    )


def _build_fixture(live) -> None:
    with live.client("mira") as client:
        made = client.post(
            "/v1/suppressions",
            json={"kind": "pattern", "value": "official-*", "reason": "the operator's accounts"},
        )
    assert made.status_code == 201, made.text
    file_window(
        live,
        live.settings,
        0,
        [
            new_alert("m-p", 6.0, 1, 2),
            new_alert("m-q", 5.0, 1, 2),
            new_alert("m-r", 7.0, None, 3),
            new_alert("official-1", 9.0, 2, 3),
        ],
        now_us=_close(0),
    )
    _decide(live, "mira", "m-p", _close(0) + 2 * HOUR_US, state="confirmed")
    _decide(
        live, "theo", "m-q", _close(0) + 4 * HOUR_US, state="dismissed", reason="expected_behaviour"
    )
    file_window(
        live,
        live.settings,
        1,
        [
            new_alert("m-p", 6.5, 2, 3),
            new_alert("m-s", 4.5, 1, 2),
            new_alert("official-1", 8.0, 3, 2),
            new_alert("official-2", 5.0, 1, 2),
        ],
        now_us=_close(1),
    )
    _decide(live, "mira", "m-s", _close(1) + HOUR_US // 2, state="in_review")
    _decide(live, "mira", "m-s", _close(1) + HOUR_US, state="confirmed")
    _decide(live, "theo", "m-r", _close(1) + 10 * HOUR_US, state="dismissed", reason="data_problem")
    file_window(
        live,
        live.settings,
        2,
        [new_alert("m-q", 5.2, 1, 2), new_alert("m-t", 4.2, 2, 3), new_alert("m-u", 6.0, 1, 2)],
        now_us=_close(2),
    )
    _decide(live, "theo", "m-u", _close(2) + HOUR_US, state="dismissed", reason="duplicate")
    _decide(live, "theo", "m-u", _close(2) + 2 * HOUR_US, state="open")


def _expected(raised, suppressed, reviewed, confirmed, dismissed, reasons, median, precision):
    figures = {
        "raised": raised,
        "suppressed": suppressed,
        "reviewed": reviewed,
        "confirmed": confirmed,
        "dismissed": dismissed,
        "median_time_to_review_seconds": median,
        "precision": precision,
    }
    figures.update({f"dismissed_{reason}": reasons.get(reason, 0) for reason in REASONS})
    return figures


def _figures(row: dict) -> dict:
    return {name: row[name] for name in _expected(0, 0, 0, 0, 0, {}, None, None)}


def test_review_figures_match_the_hand_count(live):
    _build_fixture(live)
    with live.client("reader") as client:
        answer = client.get("/v1/review/stats")
        by_window_csv = client.get("/v1/review/stats.csv", params={"by": "window"})
        by_move_csv = client.get("/v1/review/stats.csv", params={"by": "transition"})
        later = client.get("/v1/review/stats", params={"from": "2026-02-12T00:00:00Z"}).json()
    assert answer.status_code == 200, answer.text
    figures = answer.json()
    expected = {"expected_behaviour": 2, "data_problem": 1}
    assert _figures(figures["totals"]) == _expected(8, 3, 6, 3, 3, expected, 10800.0, 0.5)

    windows = figures["windows"]
    assert [w["window_end"] for w in windows] == [
        "2026-02-05T00:00:00Z",
        "2026-02-12T00:00:00Z",
        "2026-02-19T00:00:00Z",
    ]
    assert _figures(windows[0]) == _expected(
        3, 1, 3, 1, 2, {"expected_behaviour": 1, "data_problem": 1}, 14400.0, 1 / 3
    )
    assert _figures(windows[1]) == _expected(2, 2, 2, 2, 0, {}, 3600.0, 1.0)
    assert _figures(windows[2]) == _expected(3, 0, 1, 0, 1, {"expected_behaviour": 1}, None, 0.0)

    moves = {(m["role_before"], m["role_after"]): _figures(m) for m in figures["transitions"]}
    assert list(moves) == [
        ("role 1", "role 2"),
        ("role 2", "role 3"),
        ("no baseline", "role 3"),
        ("role 3", "role 2"),
    ]
    assert moves[("role 1", "role 2")] == _expected(
        5, 1, 4, 2, 2, {"expected_behaviour": 2}, 7200.0, 0.5
    )
    assert moves[("role 2", "role 3")] == _expected(2, 1, 1, 1, 0, {}, None, 1.0)
    assert moves[("no baseline", "role 3")] == _expected(
        1, 0, 1, 0, 1, {"data_problem": 1}, 640800.0, 0.0
    )
    assert moves[("role 3", "role 2")] == _expected(0, 1, 0, 0, 0, {}, None, None)

    # A period keeps only the windows ending in it.
    assert [w["window_id"] for w in later["windows"]] == [w["window_id"] for w in windows[1:]]
    assert later["totals"]["raised"] == 5 and later["totals"]["suppressed"] == 2

    # The CSV tables hold the same rows as the JSON (read back with Python's csv module).
    assert by_window_csv.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(by_window_csv.text)))
    assert [int(r["window_id"]) for r in rows] == [w["window_id"] for w in windows]
    for row, window in zip(rows, windows, strict=True):
        for name in ("raised", "suppressed", "reviewed", "confirmed", "dismissed"):
            assert int(row[name]) == window[name]
        assert (float(row["precision"]) if row["precision"] else None) == window["precision"]
    moves_csv = list(csv.DictReader(io.StringIO(by_move_csv.text)))
    assert [(r["role_before"], r["role_after"]) for r in moves_csv] == list(moves)
    assert [r["median_time_to_review_seconds"] for r in moves_csv] == ["7200.0", "", "640800.0", ""]
