"""Writing a generated scenario to files a person or the service can replay."""

from __future__ import annotations

import csv
import json
from pathlib import Path

from .marketplace import Scenario

EVENT_FIELDS = ("id", "time", "actor", "target", "kind", "weight")


def write(scenario: Scenario, directory) -> dict[str, Path]:
    """Write ``events.ndjson``, ``events.csv``, ``truth.json`` and ``accounts.csv``.

    The bytes depend only on the scenario, so the same seed always gives identical files.
    Returns the written paths by name.
    """
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    paths = {
        name: directory / name
        for name in ("events.ndjson", "events.csv", "truth.json", "accounts.csv")
    }
    with (
        open(paths["events.ndjson"], "w", encoding="utf-8", newline="\n") as ndjson,
        open(paths["events.csv"], "w", encoding="utf-8", newline="") as table,
    ):
        rows = csv.writer(table, lineterminator="\n")
        rows.writerow(EVENT_FIELDS)
        for event in scenario.iter_events():
            ndjson.write(json.dumps(event, separators=(",", ":")) + "\n")
            rows.writerow([event[f] for f in EVENT_FIELDS])
    body = {"meta": scenario.meta, "truth": scenario.truth}
    paths["truth.json"].write_text(json.dumps(body, indent=1) + "\n", encoding="utf-8")
    acc = scenario.accounts
    with open(paths["accounts.csv"], "w", encoding="utf-8", newline="") as table:
        rows = csv.writer(table, lineterminator="\n")
        rows.writerow(("account", "archetype", "neighbourhood", "joined_window"))
        rows.writerows(
            zip(
                acc["id"].tolist(),
                acc["archetype"].tolist(),
                acc["neighbourhood"].tolist(),
                acc["joined_window"].tolist(),
                strict=False,
            )
        )
    return paths
