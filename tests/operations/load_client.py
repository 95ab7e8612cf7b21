"""A separate client process for the crash tests: posts numbered batches of events with known
ids to a server and writes one line per batch to a file — ``ack N`` when the server answered
202 (the events are then acknowledged, so they must survive), ``fail N reason`` otherwise.
It retries nothing; it stops after the last batch or at a file named ``stop`` beside the log.

    python load_client.py URL KEY LOG FIRST_BATCH N_BATCHES BATCH_SIZE [PAUSE_S]
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import httpx


def batch_events(number: int, size: int) -> list[dict]:
    base = 1_780_272_000 + number * size  # 2026-06-01T00:00:00Z onwards, one event a second
    return [
        {
            "id": f"crash-{number:06d}-{i:04d}",
            "time": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(base + i)),
            "actor": f"m-{(number * 7 + i) % 997:04d}",
            "target": f"m-{(number * 7 + i + 1) % 997:04d}",
            "kind": "payment",
            "weight": 1.0 + i % 13,
        }
        for i in range(size)
    ]


def main(
    url: str, key: str, log: str, first: int, count: int, size: int, pause: float = 0.0
) -> None:
    stop = Path(log).with_name("stop")
    with open(log, "a", encoding="utf-8") as out, httpx.Client(timeout=30) as client:
        for number in range(first, first + count):
            if stop.exists():
                break
            try:
                response = client.post(
                    url + "/v1/events",
                    json={"events": batch_events(number, size)},
                    headers={"Authorization": f"Bearer {key}"},
                )
                if (
                    response.status_code == 202
                    and response.json()["accepted"] + response.json()["duplicates"] == size
                ):
                    out.write(f"ack {number}\n")
                else:
                    out.write(f"fail {number} {response.status_code}\n")
            except httpx.HTTPError as error:
                out.write(f"fail {number} {type(error).__name__}\n")
                time.sleep(0.05)
            out.flush()
            if pause:
                time.sleep(pause)


if __name__ == "__main__":
    url, key, log, first, count, size, *rest = sys.argv[1:]
    main(url, key, log, int(first), int(count), int(size), float(rest[0]) if rest else 0.0)
