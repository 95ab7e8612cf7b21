"""An account's history over real HTTP when the store does not hold its windows'
memberships (``store_memberships_max_accounts`` below every window): the REST history and the
account page read the Parquet outputs and show what a store holding everything shows.

The events are the fictional marketplace sample in fixtures/sample (invented data).
"""

from __future__ import annotations

import re
from datetime import UTC, datetime
from pathlib import Path

import httpx
import pytest
import sqlalchemy as sa

from rolewatch.api.app import create_app
from rolewatch.clock import now_micros
from rolewatch.pipeline.closer import close_due_windows
from rolewatch.store.db import open_store
from rolewatch.store.events import ingest
from rolewatch.store.keys import create_key
from rolewatch.store.schema import alerts, memberships

from .conftest import NOW, sample_events, sample_settings
from .helpers import served

_TOKENS = re.compile(r'(name="(?:token|csrf)[^"]*" value=")[^"]*"')


def _closed_store(folder: Path, **overrides):
    settings = sample_settings(
        folder / "store.db", output_archive=str(folder / "outputs"), **overrides
    )
    engine = open_store(settings)
    ingest(engine, settings, sample_events(), NOW)
    close_due_windows(engine, settings, now_us=NOW, drain=True)
    key = create_key(engine, ["read"], label="history test", now_us=now_micros())[1]
    return settings, engine, key


@pytest.fixture(scope="module")
def two_sites(tmp_path_factory):
    """The sample closed twice, everything stored and nothing stored, each app served."""
    everything = _closed_store(tmp_path_factory.mktemp("everything"))
    parquet_only = _closed_store(
        tmp_path_factory.mktemp("parquet-only"), store_memberships_max_accounts=1
    )
    with served(create_app(everything[0], run_jobs=False)) as left:
        with served(create_app(parquet_only[0], run_jobs=False)) as right:
            yield (left, everything), (right, parquet_only)
    everything[1].dispose()
    parquet_only[1].dispose()


def _accounts(engine) -> list[str]:
    """An account with an alert and the one active in the most windows."""
    with engine.connect() as connection:
        alerted = connection.execute(sa.select(alerts.c.account).limit(1)).scalar_one()
        busiest = connection.execute(
            sa.select(memberships.c.account)
            .group_by(memberships.c.account)
            .order_by(sa.func.count().desc(), memberships.c.account)
            .limit(1)
        ).scalar_one()
    return [alerted, busiest]


def test_rest_history_reads_the_parquet_outputs(two_sites):
    (left, (_, engine, left_key)), (right, (_, right_engine, right_key)) = two_sites
    with right_engine.connect() as connection:
        assert connection.execute(sa.select(sa.func.count()).select_from(memberships)).scalar() == 0
    for account in _accounts(engine):
        path = f"/v1/accounts/{account}/roles"
        for params in ({}, {"from": "2026-02-01T00:00:00Z", "to": "2026-03-01T00:00:00Z"}):
            expected = httpx.get(
                left + path, params=params, headers={"Authorization": f"Bearer {left_key}"}
            )
            got = httpx.get(
                right + path, params=params, headers={"Authorization": f"Bearer {right_key}"}
            )
            assert expected.status_code == got.status_code == 200
            assert expected.json()["windows"], account
            assert got.json() == expected.json()
    unknown = httpx.get(
        right + "/v1/accounts/m-nobody/roles", headers={"Authorization": f"Bearer {right_key}"}
    )
    assert unknown.status_code == 404
    assert "unknown account" in unknown.text


def _page(url: str, key: str, path: str) -> httpx.Response:
    """GET a page after signing in through the sign-in form, as a browser does."""
    with httpx.Client(base_url=url) as client:
        form = client.get("/signin")
        token = re.search(r'name="token" value="([^"]*)"', form.text)
        assert token is not None
        signed = client.post("/signin", data={"key": key, "next": "/", "token": token.group(1)})
        assert signed.status_code == 303  # to the page asked for, signed in
        return client.get(path)


def _same_page(html: str, key: str) -> str:
    """The page without what differs between two sign-ins: form tokens, the key's id and
    times of today (the sign-in's own)."""
    today = datetime.now(UTC).date().isoformat()
    html = re.sub(rf'<time datetime="{today}T[^"]*">[^<]*</time>', "<time>now</time>", html)
    return _TOKENS.sub(r"\1", html).replace(key.split("_")[1], "KEY")


def test_account_page_reads_the_parquet_outputs(two_sites):
    (left, (_, engine, left_key)), (right, (_, _, right_key)) = two_sites
    for account in _accounts(engine):
        expected = _page(left, left_key, f"/accounts/{account}")
        got = _page(right, right_key, f"/accounts/{account}")
        assert expected.status_code == got.status_code == 200
        assert _same_page(got.text, right_key) == _same_page(expected.text, left_key)
    assert _page(right, right_key, "/accounts/m-nobody").status_code == 404
