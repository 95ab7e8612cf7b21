"""Window geometry and the watermark rule (docs: rolewatch.pipeline.windows)."""

from rolewatch.clock import to_rfc3339
from rolewatch.pipeline.windows import StreamState, WindowGeometry, is_due, next_window_end

DAY = 86_400 * 1_000_000
HOUR = 3_600 * 1_000_000
GEOMETRY = WindowGeometry(
    period_us=7 * DAY, span_us=7 * DAY, lateness_us=HOUR, idle_us=10 * 60 * 1_000_000
)


def test_windows_align_to_utc_epoch_multiples_of_the_period():
    # 1970-01-01 was a Thursday, so 7-day windows end on Thursdays 00:00 UTC
    # (calendar fact, common practice, no source).
    end = GEOMETRY.end_after(1_767_225_600 * 1_000_000 + 5 * HOUR)  # 2026-01-01T05:00Z
    assert to_rfc3339(end) == "2026-01-08T00:00:00Z"
    assert to_rfc3339(GEOMETRY.start_of(end)) == "2026-01-01T00:00:00Z"


def test_watermark_closes_a_window_only_after_lateness():
    end = 10 * 7 * DAY
    busy = end + 2 * HOUR  # events are still arriving now
    state = StreamState(
        min_event_us=end - DAY,
        max_event_us=end + HOUR - 1,
        last_closed_end_us=None,
        last_ingest_us=busy,
    )
    assert next_window_end(GEOMETRY, state) == end
    assert not is_due(GEOMETRY, state, end, now_us=busy, drain=False)
    state = StreamState(
        min_event_us=end - DAY,
        max_event_us=end + HOUR,
        last_closed_end_us=None,
        last_ingest_us=end + HOUR,
    )
    assert is_due(GEOMETRY, state, end, now_us=end + HOUR, drain=False)


def test_idle_rule_closes_the_trailing_window_but_invents_no_empty_ones():
    end = 10 * 7 * DAY
    last_ingest = end + HOUR
    state = StreamState(
        min_event_us=end - DAY,
        max_event_us=end - DAY,
        last_closed_end_us=None,
        last_ingest_us=last_ingest,
    )
    # no new event for less than idle_close_after: wait
    assert not is_due(GEOMETRY, state, end, now_us=last_ingest + 60 * 1_000_000, drain=False)
    # idle long enough: the window holding the last event closes
    assert is_due(GEOMETRY, state, end, now_us=last_ingest + 11 * 60 * 1_000_000, drain=False)
    # the window after it holds no data: it never closes on the idle rule
    assert not is_due(GEOMETRY, state, end + 7 * DAY, now_us=end + 100 * DAY, drain=True)


def test_no_events_no_windows():
    state = StreamState(None, None, None, None)
    assert next_window_end(GEOMETRY, state) is None
