"""Window arithmetic: alignment to UTC, the watermark, and which window is due next.

A window is identified by its end. Ends are multiples of ``period`` counted from the Unix
epoch (so windows are aligned to UTC), and a window covers events with
``end - span <= time < end``. With ``span == period`` windows tumble; with a longer span they
hop and overlap.

A window is due when either

* the watermark has passed its end: ``max(event time) - lateness >= end`` (bulk uploads and
  a live stream both move the watermark with the events themselves), or
* the stream is idle: no event has arrived for ``idle_close_after``, the wall clock is past
  ``end + lateness`` and the window's last period holds data (``end - period <= max event
  time``); this closes the trailing window of a finished upload or a quiet stream without
  inventing empty windows for time nobody has sent data for.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import timedelta

from rolewatch.clock import MICROS
from rolewatch.config import Settings
from rolewatch.store.windows import StreamState

__all__ = ["StreamState", "WindowGeometry", "is_due", "next_window_end"]


@dataclass(frozen=True)
class WindowGeometry:
    """Period, span and lateness in microseconds."""

    period_us: int
    span_us: int
    lateness_us: int
    idle_us: int

    @classmethod
    def from_settings(cls, settings: Settings) -> WindowGeometry:
        def micros(delta: timedelta) -> int:
            return int(round(delta.total_seconds() * MICROS))

        return cls(
            period_us=micros(settings.window_period),
            span_us=micros(settings.window_span),
            lateness_us=micros(settings.window_lateness),
            idle_us=micros(settings.idle_close_after),
        )

    def end_after(self, time_us: int) -> int:
        """The end of the first window whose last period contains ``time_us``."""
        return (time_us // self.period_us + 1) * self.period_us

    def start_of(self, end_us: int) -> int:
        return end_us - self.span_us


def next_window_end(geometry: WindowGeometry, state: StreamState) -> int | None:
    """End of the next window to close, or None when no event has ever arrived."""
    if state.last_closed_end_us is not None:
        return state.last_closed_end_us + geometry.period_us
    if state.min_event_us is None:
        return None
    return geometry.end_after(state.min_event_us)


def is_due(
    geometry: WindowGeometry, state: StreamState, end_us: int, now_us: int, *, drain: bool
) -> bool:
    """Whether the window ending at ``end_us`` may close now (see the module docstring)."""
    if state.max_event_us is None:
        return False
    if end_us <= state.max_event_us - geometry.lateness_us:
        return True
    idle = drain or (
        state.last_ingest_us is not None and now_us - state.last_ingest_us >= geometry.idle_us
    )
    holds_data = end_us - geometry.period_us <= state.max_event_us
    return idle and holds_data and end_us + geometry.lateness_us <= now_us
