"""What the forum, payments and guild-trading scenarios share: rhythm, event log, assembly.

Each scenario module draws its own population and ordinary weekly activity; the planted
changes and negative controls are acted out by :mod:`rolewatch.scenario.planting`. This
module holds the plumbing between them: times with a daily and weekly rhythm, lognormal
amounts, an event log that hands out ids for brand-new accounts, and the assembly of the
finished :class:`~rolewatch.scenario.marketplace.Scenario` (the same shape the
marketplace returns, so ``write`` and the evaluation code take any scenario).

Windows follow the marketplace: 7-day windows aligned to whole multiples of the period
counted from the Unix epoch (a Thursday), default start Thursday 2026-01-01T00:00:00Z.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta

import numpy as np

from .marketplace import WEEK_SECONDS, EventColumns, Scenario, _check_start

DAY_SECONDS = 24 * 3600
GENERATOR_VERSION = "1"
FRESH_PREFIX = "new-"  # brand-new accounts created by a planted change, as in the marketplace


def normalised(weights) -> np.ndarray:
    weights = np.asarray(weights, dtype=np.float64)
    return weights / weights.sum()


@dataclass(frozen=True)
class Rhythm:
    """When in the week events happen: weights per hour of day and per day of the window.

    ``daily[0]`` is the first day of a window, a Thursday (windows start on Thursdays).
    """

    hourly: np.ndarray
    daily: np.ndarray

    @classmethod
    def of(cls, hourly, daily) -> Rhythm:
        return cls(normalised(hourly), normalised(daily))

    def times(self, rng: np.random.Generator, week_start: int, n: int) -> np.ndarray:
        """``n`` event times (epoch seconds) inside the week starting at ``week_start``."""
        day = rng.choice(7, size=n, p=self.daily)
        hour = rng.choice(24, size=n, p=self.hourly)
        return week_start + day * DAY_SECONDS + hour * 3600 + rng.integers(0, 3600, n)


def later(
    rng: np.random.Generator, seconds: np.ndarray, week_end: int, low=60, high=6 * 3600
) -> np.ndarray:
    """A follow-up ``low`` to ``high`` seconds after each time, kept inside the week."""
    return np.minimum(seconds + rng.integers(low, high, len(seconds)), week_end - 1)


def amounts(rng: np.random.Generator, median, sigma: float, n: int, digits: int = 2):
    """Lognormal amounts rounded to ``digits`` decimals (cents by default) and at least one
    unit of the last digit, or 1.0 each when ``median`` is None (a network without amounts)."""
    if median is None:
        return np.ones(n)
    smallest = 10.0**-digits
    return np.maximum(np.round(rng.lognormal(np.log(median), sigma, n), digits), smallest)


@dataclass
class Batch:
    """Events as parallel integer arrays: account indices, seconds, kind codes, weights."""

    actor: np.ndarray
    target: np.ndarray
    seconds: np.ndarray
    kind: np.ndarray
    weight: np.ndarray

    @classmethod
    def empty(cls) -> Batch:
        ints = np.zeros(0, np.int64)
        return cls(ints, ints, ints, np.zeros(0, np.int8), np.zeros(0))

    @classmethod
    def join(cls, batches: list[Batch]) -> Batch:
        if not batches:
            return cls.empty()
        return cls(
            *(np.concatenate([getattr(b, f) for b in batches]) for f in Batch.__dataclass_fields__)
        )

    def where(self, mask: np.ndarray) -> Batch:
        return Batch(
            self.actor[mask],
            self.target[mask],
            self.seconds[mask],
            self.kind[mask],
            self.weight[mask],
        )

    def __len__(self) -> int:
        return len(self.actor)


class EventLog:
    """Collects one week's events at a time; fresh accounts get indices as they appear."""

    def __init__(self, population_size: int):
        self.population_size = population_size
        self.next_fresh = population_size
        self.fresh_labels: list[str] = []  # archetype name of each fresh account
        self.weeks: list[Batch] = []
        self._pending: list[Batch] = []

    def add(self, actor, target, seconds, kind, weight) -> None:
        n = len(actor)
        self._pending.append(
            Batch(
                np.asarray(actor, np.int64),
                np.asarray(target, np.int64),
                np.asarray(seconds, np.int64),
                np.broadcast_to(np.asarray(kind, np.int8), (n,)).copy(),
                np.broadcast_to(np.asarray(weight, np.float64), (n,)).copy(),
            )
        )

    def new_accounts(self, count: int, label: str) -> np.ndarray:
        out = np.arange(self.next_fresh, self.next_fresh + count)
        self.next_fresh += count
        self.fresh_labels.extend([label] * count)
        return out

    def drain(self) -> Batch:
        """The events added since the last drain, as one batch."""
        batch, self._pending = Batch.join(self._pending), []
        return batch

    def commit(self, week_events: Batch) -> None:
        self.weeks.append(week_events)

    @property
    def fresh(self) -> int:
        return self.next_fresh - self.population_size


@dataclass
class Members:
    """Standing attributes of a scenario's members, indexed by member number.

    Members ``0 .. initial-1`` exist from the first week; later indices are newcomers who
    join in ``joined[i]``. A *community* is the close group a member belongs to (a topic,
    a region, a guild); a *zone* is a set of communities, and members of two zones whose
    ``reach`` entry is False never deal with each other in ordinary activity, so a planted
    bridge between them is the only tie.
    """

    prefix: str  # account ids are prefix + five digits
    initial: int
    archetype: np.ndarray  # int codes into archetype_names
    archetype_names: tuple[str, ...]
    community: np.ndarray  # int codes into community_names
    community_names: list[str]
    community_zone: np.ndarray  # zone of each community
    zone_names: tuple[str, ...]
    reach: np.ndarray  # (zones, zones) bool: may members of these zones deal with each other
    joined: np.ndarray  # week index each member first appears in
    away_prone: np.ndarray = field(repr=False)  # bool: may take an ordinary break of weeks

    @property
    def size(self) -> int:
        return len(self.archetype)

    @property
    def zone(self) -> np.ndarray:
        return self.community_zone[self.community]

    def ids(self) -> list[str]:
        return [f"{self.prefix}{i:05d}" for i in range(self.size)]

    def never_dealing(self) -> list[tuple[int, int]]:
        """Zone pairs whose members never deal with each other in ordinary activity."""
        z = len(self.zone_names)
        return [(a, b) for a in range(z) for b in range(a + 1, z) if not self.reach[a, b]]


def check_sizes(members: int, weeks: int, training_weeks: int) -> None:
    if members < 200:
        raise ValueError(f"members={members} is too small; use at least 200")
    if training_weeks < 1 or weeks < training_weeks + 3:
        raise ValueError(
            f"weeks={weeks}, training_weeks={training_weeks}: need training_weeks >= 1 and "
            f"weeks >= training_weeks + 3 so planted changes have room after training"
        )


def default_season_week(weeks: int, training_weeks: int) -> int:
    """The busy week: two thirds into the run, after training and before the last week."""
    return min(max(weeks * 2 // 3, training_weeks), weeks - 2)


def default_instances(members: int) -> int:
    """Accounts per planted type: about one per 300 members (10 at 3,000), at least 3."""
    return max(3, round(members / 300))


def aligned_start(start: datetime) -> datetime:
    """``start`` in UTC, refused unless it is on a 7-day window boundary."""
    return _check_start(start)


def rfc3339(moment: datetime) -> str:
    return moment.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def event_columns(log: EventLog, ids: np.ndarray, kinds, id_prefix: str) -> EventColumns:
    """All logged events in time order (ties keep generation order) as wire columns."""
    ev = Batch.join(log.weeks)
    order = np.argsort(ev.seconds, kind="stable")
    n = len(order)
    return EventColumns(
        id=np.char.add(id_prefix, np.char.zfill(np.arange(n).astype(str), 7)),
        time=ev.seconds[order].astype("datetime64[s]"),
        actor=ids[ev.actor[order]],
        target=ids[ev.target[order]],
        kind=np.array(kinds)[ev.kind[order]],
        weight=ev.weight[order].astype(np.float64),
    )


def account_table(members: Members, log: EventLog, ids: np.ndarray, start: int) -> dict:
    """Columns id, archetype, neighbourhood (the community), community, zone, joined_window.

    ``neighbourhood`` repeats the community name so the marketplace's file writer and
    readers work unchanged; fresh accounts have an empty community and zone and their
    first window with events as ``joined_window``.
    """
    fresh = log.fresh
    ev = Batch.join(log.weeks)
    week_of = (ev.seconds - start) // WEEK_SECONDS
    first_seen = np.full(len(ids), np.iinfo(np.int64).max, np.int64)
    for ends in (ev.actor, ev.target):
        np.minimum.at(first_seen, ends, week_of)
    community = np.concatenate(
        [np.array(members.community_names)[members.community], np.full(fresh, "")]
    )
    zone = np.concatenate([np.array(members.zone_names)[members.zone], np.full(fresh, "")])
    return {
        "id": ids,
        "archetype": np.concatenate(
            [np.array(members.archetype_names)[members.archetype], np.array(log.fresh_labels, str)]
        ),
        "neighbourhood": community,
        "community": community,
        "zone": zone,
        "joined_window": np.concatenate([members.joined, first_seen[members.size :]]),
    }


def assemble(
    *,
    members: Members,
    log: EventLog,
    kinds: tuple[str, ...],
    id_prefix: str,
    start: datetime,
    truth: list[dict],
    meta: dict,
) -> Scenario:
    """Turn the logged events and the plan into a :class:`Scenario`."""
    ids = np.array(members.ids() + [f"{FRESH_PREFIX}{k:05d}" for k in range(log.fresh)])
    events = event_columns(log, ids, kinds, id_prefix)
    accounts = account_table(members, log, ids, int(start.timestamp()))
    meta = {**meta, "events": len(events), "fresh_accounts": int(log.fresh)}
    return Scenario(events=events, truth=truth, meta=meta, accounts=accounts)


def window_start_text(start: datetime, index: int) -> str:
    return rfc3339(start + timedelta(weeks=index))
