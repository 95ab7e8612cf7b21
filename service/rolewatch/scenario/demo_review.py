"""The demo's reviewer: works a few cases over the REST API, so the queue shows every state
and the review figures page has something to count.

A demo reviewer knows the fictional marketplace's truth: a case of an account with a planted
structural change is confirmed, any other case is dismissed as expected behaviour. The
reviewer works the three highest-scoring and the three lowest-scoring open cases (so both
decisions show up in the figures) and leaves the rest open. (On a real platform a person
decides by reading the evidence; the truth exists only in the scenario.)
"""

from __future__ import annotations

from typing import Any

import httpx

from rolewatch.scenario.plants import STRUCTURAL

FROM_EACH_END = 3  # cases the demo reviewer decides from the top and the bottom of the queue


def _patch(client: httpx.Client, headers: dict[str, str], case: dict[str, Any], **body: Any):
    answer = client.patch(
        f"/v1/cases/{case['id']}", json={"version": case["version"], **body}, headers=headers
    )
    answer.raise_for_status()
    return answer.json()


def review_a_few(
    client: httpx.Client, headers: dict[str, str], truth: list[dict[str, Any]]
) -> dict[str, int]:
    """Take a few open cases one by one: start the review, add a note, then confirm or
    dismiss. Returns how many were confirmed and dismissed."""
    planted = {row["account"] for row in truth if row["change"] in STRUCTURAL}
    listing = client.get("/v1/cases", params={"state": "open", "limit": 500}, headers=headers)
    listing.raise_for_status()
    queue = listing.json()["cases"]  # highest latest score first
    chosen = queue[:FROM_EACH_END] + queue[FROM_EACH_END:][-FROM_EACH_END:]
    counts = {"confirmed": 0, "dismissed": 0}
    for case in chosen:
        case = _patch(client, headers, case, state="in_review")
        note = client.post(
            f"/v1/cases/{case['id']}/notes",
            json={"text": "Read the evidence: counterparts and feature moves (demo reviewer)."},
            headers=headers,
        )
        note.raise_for_status()
        if case["account"] in planted:
            _patch(
                client,
                headers,
                case,
                state="confirmed",
                text="The change the marketplace scenario planted for this account.",
            )
            counts["confirmed"] += 1
        else:
            _patch(
                client,
                headers,
                case,
                state="dismissed",
                reason="expected_behaviour",
                text="No planted change: ordinary marketplace behaviour.",
            )
            counts["dismissed"] += 1
    return counts
