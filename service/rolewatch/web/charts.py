"""Geometry of the server-rendered SVG charts (plain numbers; the templates draw them).

Charts are computed here, in Python, so pages work without JavaScript and the markup stays
declarative: the templates only place rectangles and labels at the positions given.
"""

from __future__ import annotations

import math
from collections.abc import Collection, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from typing import Any

PALETTE_SIZE = 8  # colours in the CSS palette (role-c0 .. role-c7); more roles get hatching
EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
Row = dict[str, Any]
"""A stored row as a mapping: a closed window, or an account's membership entry."""


def day(time_us: int) -> str:
    """Microseconds since the epoch → ``YYYY-MM-DD`` (UTC)."""
    return (EPOCH + timedelta(microseconds=int(time_us))).strftime("%Y-%m-%d")


def short_day(time_us: int) -> str:
    """Microseconds since the epoch → ``DD Mon`` (UTC), for axis labels."""
    return (EPOCH + timedelta(microseconds=int(time_us))).strftime("%d %b")


def role_style(index: int) -> dict[str, Any]:
    """CSS colour class and hatching flag of the role at ``index`` in the catalogue order."""
    return {"colour": f"role-c{index % PALETTE_SIZE}", "hatched": index >= PALETTE_SIZE}


@dataclass
class Column:
    window_id: int
    x: float
    width: float
    centre: float
    label: str | None
    title: str
    active: bool
    alert: bool
    selected: bool
    summary: str = ""


@dataclass
class Band:
    role_id: int
    name: str
    colour: str
    hatched: bool
    rects: list[dict[str, Any]] = field(default_factory=list)


@dataclass
class MixtureChart:
    width: int
    height: int
    plot_left: float
    plot_top: float
    plot_width: float
    plot_height: float
    columns: list[Column]
    bands: list[Band]
    y_ticks: list[dict[str, Any]]


@dataclass
class ActivityChart:
    width: int
    height: int
    plot_left: float
    plot_width: float
    axis_y: float
    top: float
    bottom: float
    max_out: int
    max_in: int
    bars: list[dict[str, Any]]


WIDTH = 960
LEFT, RIGHT = 64, 16


def _columns(
    windows: list[Row],
    active_ids: Collection[int],
    alert_ids: Collection[int],
    selected_id: int | None,
) -> tuple[list[Column], float]:
    count = max(len(windows), 1)
    plot_width = WIDTH - LEFT - RIGHT
    step = plot_width / count
    every = max(1, math.ceil(count / 12))
    columns = []
    for index, window in enumerate(windows):
        start, end = window["start_us"], window["end_us"]
        columns.append(
            Column(
                window_id=int(window["id"]),
                x=LEFT + index * step + step * 0.1,
                width=step * 0.8,
                centre=LEFT + index * step + step / 2,
                label=short_day(start) if index % every == 0 else None,
                title=f"window {day(start)} to {day(end)}",
                active=window["id"] in active_ids,
                alert=window["id"] in alert_ids,
                selected=window["id"] == selected_id,
            )
        )
    return columns, plot_width


def mixture_chart(
    windows: list[Row],
    history: dict[int, Row],
    roles: list[tuple[int, str]],
    alert_ids: Iterable[int],
    selected_id: int | None,
) -> MixtureChart:
    """Stacked columns, one per closed window, one band (SVG group) per role.

    ``windows``: closed windows oldest first; ``history``: ``{window_id: membership entry}``
    (mixture keys are role ids as strings); ``roles``: ``[(role_id, name)]`` in legend order.
    Windows where the account was not active stay empty.
    """
    top, plot_height, bottom = 30, 220, 44
    columns, plot_width = _columns(windows, set(history), set(alert_ids), selected_id)
    bands = []
    for index, (role_id, name) in enumerate(roles):
        style = role_style(index)
        bands.append(Band(role_id, name, style["colour"], style["hatched"]))
    for column in columns:
        entry = history.get(column.window_id)
        if entry is None:
            column.summary = f"{column.title}: not active"
            continue
        mixture = entry["mixture"]
        if not mixture:
            column.summary = f"{column.title}: too little activity to fit a role"
            continue
        shares = sorted(
            ((float(mixture.get(str(band.role_id), 0.0) or 0.0), band.name) for band in bands),
            reverse=True,
        )
        column.summary = f"{column.title}: " + "; ".join(
            f"{name} {share:.0%}" for share, name in shares[:3] if share >= 0.005
        )
        base = float(top + plot_height)
        for band in bands:
            share = float(mixture.get(str(band.role_id), mixture.get(band.role_id, 0.0)) or 0.0)
            height = share * plot_height
            base -= height
            if height <= 0:
                continue
            band.rects.append(
                {
                    "window_id": column.window_id,
                    "share": share,
                    "x": round(column.x, 2),
                    "y": round(base, 2),
                    "width": round(column.width, 2),
                    "height": round(height, 2),
                    "title": f"{column.title}: {band.name} {share:.0%}",
                }
            )
    ticks = [
        {"y": top + plot_height * (1 - share), "label": f"{share:.0%}"}
        for share in (0.0, 0.25, 0.5, 0.75, 1.0)
    ]
    return MixtureChart(
        width=WIDTH,
        height=top + plot_height + bottom,
        plot_left=LEFT,
        plot_top=top,
        plot_width=plot_width,
        plot_height=plot_height,
        columns=columns,
        bands=bands,
        y_ticks=ticks,
    )


def activity_chart(
    windows: list[Row], history: dict[int, Row], selected_id: int | None
) -> ActivityChart:
    """Events out (above the axis) and in (below it) per window, on one shared scale."""
    top, half, bottom_margin = 24, 70, 30
    columns, plot_width = _columns(windows, set(history), set(), selected_id)
    max_out = max((history[c.window_id]["events_out"] for c in columns if c.active), default=0)
    max_in = max((history[c.window_id]["events_in"] for c in columns if c.active), default=0)
    scale = max(max_out, max_in, 1)
    axis_y = top + half
    bars = []
    for column in columns:
        entry = history.get(column.window_id)
        if entry is None:
            continue
        out_h = half * entry["events_out"] / scale
        in_h = half * entry["events_in"] / scale
        bars.append(
            {
                "x": round(column.x, 2),
                "width": round(column.width, 2),
                "out_y": round(axis_y - out_h, 2),
                "out_h": round(out_h, 2),
                "in_h": round(in_h, 2),
                "title": f"{column.title}: {entry['events_out']} events out, "
                f"{entry['events_in']} events in",
            }
        )
    return ActivityChart(
        width=WIDTH,
        height=axis_y + half + bottom_margin,
        plot_left=LEFT,
        plot_width=plot_width,
        axis_y=axis_y,
        top=top,
        bottom=axis_y + half,
        max_out=max_out,
        max_in=max_in,
        bars=bars,
    )
