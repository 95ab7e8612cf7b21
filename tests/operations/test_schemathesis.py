"""Property-based checks of the whole API against its own OpenAPI schema with schemathesis
(an outside tool: it generates requests from the schema, valid and invalid). A live
``rolewatch serve`` on loopback answers; the check is that no request gets a 5xx."""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path

import pytest
import schemathesis
from hypothesis import HealthCheck, given, settings
from schemathesis.checks import not_a_server_error

from .servers import Server, make_keys, post_events, sample_events

EXAMPLES = int(os.environ.get("ROLEWATCH_SCHEMATHESIS_EXAMPLES", "50"))
CALLS: Counter = Counter()


@pytest.fixture(scope="module")
def live(tmp_path_factory):
    url = f"sqlite:///{tmp_path_factory.mktemp('st') / 'rolewatch.db'}"
    keys = make_keys(url)
    server = Server(
        url, {"role": "api", "max_batch_events": 200, "max_batch_bytes": 200_000}
    ).start()
    try:
        # Some real data, so reads of accounts, windows and roles have something to find.
        assert post_events(server.url, keys["ingest"], sample_events()[:150]).status_code == 202
        yield server, keys
    finally:
        server.kill()
        report = {
            "operations": len({op for op, _ in CALLS}),
            "requests": sum(CALLS.values()),
            "server_errors": sum(n for (op, status), n in CALLS.items() if status >= 500),
        }
        Path("artifacts").mkdir(exist_ok=True)
        Path("artifacts/schemathesis.json").write_text(json.dumps(report) + "\n")


@pytest.mark.slow
def test_no_request_gets_a_server_error(live):
    """Every operation, positive and negative examples (schemathesis generation modes)."""
    server, keys = live
    headers = {"Authorization": f"Bearer {keys['admin']}"}
    schema = schemathesis.openapi.from_url(server.url + "/openapi.json", headers=headers)
    failures = []
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 19

    for operation in operations:

        @given(case=operation.as_strategy())
        @settings(
            max_examples=EXAMPLES,
            deadline=None,
            derandomize=True,
            database=None,
            suppress_health_check=list(HealthCheck),
        )
        def exercise(case):
            response = case.call(base_url=server.url, headers=headers, timeout=60)
            CALLS[(f"{case.method} {case.path}", response.status_code)] += 1
            try:
                case.validate_response(response, checks=[not_a_server_error])
            except Exception as error:  # keep going: report every operation that failed
                failures.append(
                    f"{case.method} {case.path}: {response.status_code} {str(error)[:300]}"
                )

        exercise()
    assert not failures, "\n".join(failures[:20])
    assert sum(CALLS.values()) >= len(operations) * 5
