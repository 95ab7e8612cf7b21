"""Run the window pipeline over a whole event table in memory, without a store.

This is the same sequence the window closer performs against the database (train on the
first windows, back-fill them, then measure each later window against its account's
history) and it calls the same :func:`compute_window`, so the detection benchmark measures
exactly what the service would alert on. A test checks that both paths agree.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from rolewatch.clock import to_rfc3339
from rolewatch.config import Settings
from rolewatch.engine.pairs import KnownPairs
from rolewatch.pipeline.compute import (
    WindowRef,
    WindowResult,
    compute_window,
    lookback_windows,
    past_from_result,
)
from rolewatch.pipeline.loading import PastWindow, WindowEvents, interned
from rolewatch.pipeline.model import FrozenModel, fit_model
from rolewatch.pipeline.recent import RecentFeatures
from rolewatch.pipeline.windows import WindowGeometry


@dataclass(frozen=True)
class OfflineWindow:
    index: int
    start_us: int
    end_us: int
    training: bool
    events: WindowEvents
    result: WindowResult


def split_windows(
    time_us: np.ndarray, geometry: WindowGeometry
) -> list[tuple[int, int, np.ndarray]]:
    """(start, end, row indices) of every window from the first event's to the last's,
    rows sorted by time (ties keep input order)."""
    if len(time_us) == 0:
        return []
    first_end = geometry.end_after(int(time_us.min()))
    last_end = geometry.end_after(int(time_us.max()))
    order = np.argsort(time_us, kind="stable")
    sorted_times = time_us[order]
    windows = []
    for end in range(first_end, last_end + 1, geometry.period_us):
        start = geometry.start_of(end)
        lo, hi = np.searchsorted(sorted_times, [start, end], side="left")
        windows.append((start, end, order[lo:hi]))
    return windows


def run_offline(
    settings: Settings,
    *,
    event_id: np.ndarray,
    time_us: np.ndarray,
    actor: np.ndarray,
    target: np.ndarray,
    weight: np.ndarray,
) -> Iterator[OfflineWindow]:
    """Yield every window of the table, measured as the service would measure it.

    Events inside a window are ordered by (time, event id) exactly as the store loads them.
    """
    geometry = WindowGeometry.from_settings(settings)
    event_id = np.asarray(event_id, dtype=object)
    time_us = np.asarray(time_us, dtype=np.int64)

    def window_events(rows: np.ndarray) -> WindowEvents:
        ordered = rows[np.lexsort((event_id[rows].astype(str), time_us[rows]))]
        return interned(
            event_id[ordered],
            np.asarray(actor, dtype=object)[ordered],
            np.asarray(target, dtype=object)[ordered],
            np.asarray(weight, dtype=np.float64)[ordered],
        )

    order = np.argsort(time_us, kind="stable")
    sorted_times = time_us[order]

    def between(start: int, end: int) -> WindowEvents:
        lo, hi = np.searchsorted(sorted_times, [start, end], side="left")
        return window_events(order[lo:hi])

    spans = split_windows(time_us, geometry)
    loaded = [
        (start, end, window_events(rows), between(start - geometry.span_us, start))
        for start, end, rows in spans
    ]
    training_count = min(settings.training_windows, len(loaded))
    if training_count < settings.training_windows:
        return
    model = fit_model(
        settings, [events.snapshot() for _s, _e, events, _p in loaded[:training_count]]
    )
    yield from measure_windows(settings, model, loaded, training_count)


def measure_windows(
    settings: Settings,
    model: FrozenModel,
    loaded: list[tuple[int, int, WindowEvents, WindowEvents]],
    training_count: int,
) -> Iterator[OfflineWindow]:
    """Measure split windows ``(start, end, events, previous span's events)`` in order,
    carrying the look-back and the known-pair history forward as the closer does."""
    lookback = lookback_windows(settings)
    past: list[PastWindow] = []
    known = KnownPairs.empty()
    recent = RecentFeatures()
    by_end = {to_rfc3339(end): events for _start, end, events, _previous in loaded}

    def events_of(ref: WindowRef) -> WindowEvents | None:
        events = by_end.get(ref.end)
        return events if events is not None and len(events) else None

    for index, (start, end, events, _previous) in enumerate(loaded):
        training = index < training_count
        ref = WindowRef(id=None, start=to_rfc3339(start), end=to_rfc3339(end))
        result = compute_window(
            model,
            settings,
            events,
            past,
            known,
            window=ref,
            raise_alerts=not training,
            events_of=events_of,
            recent=recent,
        )
        past = (past + [past_from_result(result, ref)])[-lookback:]
        if result.new_pairs is not None:
            known = known.with_keys(result.new_pairs)
        yield OfflineWindow(index, start, end, training, events, result)
