"""A fictional hobby forum: replies, mentions and follows inside topic communities.

Members belong to a topic (knitting, fossils, canoeing, ...); topics sit in four sections,
and members of different sections never deal with each other, so a planted bridge is the
only tie between them. Each week members reply in threads of their topic: a reply goes to
the thread's author or to someone else who replied in the same thread, which closes
triangles the way a real thread does. Authors answer some replies.

* ``lurker`` (about 64 %): bursty; in most weeks silent, now and then one to a few replies;
* ``regular`` (33 %): replies a few times a week (lognormal, heavy-tailed), mentions a
  handful of friends in its topic; a quarter also take part in a second topic of the section;
* ``broadcaster`` (3 %): starts many threads and is followed by many (Pareto appeal), but
  replies little and rarely answers;
* ``moderator`` (one per topic, two in big ones): replies to many threads a week and is
  answered about half the time.

A tenth of replies quote the post they answer. Follows are one-off, mostly towards
broadcasters. The forum has no amounts: every event
weighs 1. Evenings and weekends are busier. All names and data are invented.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

import numpy as np

from .common import (
    WEEK_SECONDS,
    EventLog,
    Members,
    Rhythm,
    later,
    normalised,
)
from .marketplace import DEFAULT_START, Scenario
from .planting import generate_world
from .plants import Act, Style

NAME = "forum"
KINDS = ("reply", "mention", "follow", "quote")
REPLY, MENTION, FOLLOW, QUOTE = range(4)
ARCHETYPE_NAMES = ("lurker", "regular", "broadcaster", "moderator")
LURKER, REGULAR, BROADCASTER, MODERATOR = range(4)
SECTIONS = ("crafts", "sciences", "outdoors", "kitchen")
TOPIC_NAMES = (
    ("knitting", "woodwork", "pottery", "bookbinding", "weaving", "leatherwork"),
    ("astronomy", "fossils", "weather", "microscopes", "mushrooms", "minerals"),
    ("hiking", "birding", "cycling", "gardening", "canoeing", "orienteering"),
    ("baking", "preserves", "fermenting", "coffee", "spices", "noodles"),
)
MAX_FRIENDS = 6
NESTED_SHARE = 0.45  # replies that go to another replier of the thread, not its author
QUOTE_SHARE = 0.1  # replies that quote the post they answer

RHYTHM = Rhythm.of(
    [3, 2, 1, 1, 1, 1, 2, 3, 4, 5, 5, 6, 6, 6, 6, 6, 7, 8, 9, 10, 10, 9, 7, 5],
    [1.0, 1.0, 1.25, 1.3, 1.0, 0.95, 1.0],  # Thursday .. Wednesday
)
STYLE = Style(
    takeover=Act(MENTION),
    answer=Act(REPLY),
    contact=Act(MENTION),
    funnel_in=Act(QUOTE),
    funnel_out=Act(MENTION),
    bridge=Act(REPLY),
    presence=Act(REPLY),
    steady=Act(REPLY),
    fresh_names=("recipient", "sock_puppet", "outlet"),
)


def topic_name(topic: int) -> str:
    section, k = topic % len(SECTIONS), topic // len(SECTIONS)
    base = TOPIC_NAMES[section][k % len(TOPIC_NAMES[section])]
    return base if k < len(TOPIC_NAMES[section]) else f"{base}-{k // len(TOPIC_NAMES[section]) + 1}"


@dataclass
class People:
    """Standing habits of every member, indexed like :class:`Members`."""

    archetype: np.ndarray
    topic: np.ndarray
    topic2: np.ndarray  # a second topic in the same section, or -1
    joined: np.ndarray
    rate: np.ndarray  # replies a week when active
    p_active: np.ndarray  # chance of being active in a week
    author_weight: np.ndarray  # how often the member starts threads
    p_answer: np.ndarray  # chance the member answers a reply it gets
    appeal: np.ndarray  # how often others follow the member
    follow_rate: np.ndarray
    friends: np.ndarray  # (n, MAX_FRIENDS) members it mentions
    n_friends: np.ndarray


def _archetypes(rng, topic, joined, topics) -> np.ndarray:
    u = rng.random(len(topic))
    archetype = np.where(u < 0.03, BROADCASTER, np.where(u < 0.36, REGULAR, LURKER))
    late = joined > 0
    archetype[late] = np.where(u[late] < 0.3, REGULAR, LURKER)
    for t in range(topics):
        local = np.flatnonzero((topic == t) & ~late & (archetype != BROADCASTER))
        if len(local):
            k = min(len(local), 1 + int(len(local) > 120))
            archetype[rng.choice(local, k, replace=False)] = MODERATOR
    return archetype.astype(np.int8)


def _second_topics(rng, archetype, topic, topics) -> np.ndarray:
    """A quarter of regulars and moderators also take part in a sibling topic."""
    sections = len(SECTIONS)
    in_section = np.array([len(range(s, topics, sections)) for s in range(sections)])
    section, pos = topic % sections, topic // sections
    k = in_section[section]
    step = rng.integers(1, np.maximum(k, 2))
    sibling = section + sections * ((pos + step) % k)
    takes = np.isin(archetype, (REGULAR, MODERATOR)) & (rng.random(len(topic)) < 0.25)
    return np.where(takes, sibling, -1)


def _friends(rng, archetype, topic, joined, topics) -> tuple[np.ndarray, np.ndarray]:
    n = len(topic)
    friends = np.zeros((n, MAX_FRIENDS), dtype=np.int64)
    talkers = archetype != LURKER
    n_friends = np.where(talkers, rng.integers(2, MAX_FRIENDS + 1, n), 0)
    for t in range(topics):
        pool = np.flatnonzero(
            (topic == t) & np.isin(archetype, (REGULAR, MODERATOR)) & (joined == 0)
        )
        owners = np.flatnonzero((topic == t) & talkers)
        if len(pool) < 2:
            n_friends[owners] = 0
            continue
        pick = rng.integers(0, len(pool), (len(owners), MAX_FRIENDS))
        own = pool[pick] == owners[:, None]
        pick[own] = (pick[own] + 1) % len(pool)
        friends[owners] = pool[pick]
        n_friends[owners] = np.minimum(n_friends[owners], len(pool) - 1)
    return friends, n_friends


def draw_people(rng: np.random.Generator, members: int, weeks: int, newcomer_rate: float):
    """Draw members, topics, habits and friends; newcomers join after the first week."""
    topics = max(2 * len(SECTIONS), members // 150)
    per_week = rng.poisson(newcomer_rate * members, weeks)
    per_week[0] = 0
    joined = np.concatenate([np.zeros(members, np.int64), np.repeat(np.arange(weeks), per_week)])
    n = len(joined)
    topic = rng.choice(topics, size=n, p=normalised(rng.lognormal(0.0, 0.6, topics)))
    archetype = _archetypes(rng, topic, joined, topics)
    topic2 = _second_topics(rng, archetype, topic, topics)

    def by_type(values: dict) -> np.ndarray:
        out = np.zeros(n)
        for code, draw in values.items():
            mask = archetype == code
            out[mask] = draw(int(mask.sum())) if callable(draw) else draw
        return out

    people = People(
        archetype=archetype,
        topic=topic,
        topic2=topic2,
        joined=joined,
        rate=by_type(
            {
                LURKER: lambda k: rng.lognormal(np.log(0.6), 0.5, k),
                REGULAR: lambda k: rng.lognormal(np.log(2.5), 0.9, k),
                BROADCASTER: lambda k: rng.lognormal(np.log(1.5), 0.5, k),
                MODERATOR: lambda k: rng.lognormal(np.log(20.0), 0.35, k),
            }
        ),  # fmt: skip
        p_active=by_type(
            {
                LURKER: lambda k: rng.beta(1.2, 3.5, k),
                REGULAR: lambda k: rng.beta(6.0, 1.5, k),
                BROADCASTER: 0.95,
                MODERATOR: 0.97,
            }
        ),  # fmt: skip
        author_weight=by_type(
            {
                LURKER: 0.02,
                REGULAR: lambda k: rng.lognormal(np.log(0.3), 0.8, k),
                BROADCASTER: lambda k: 3.0 * (rng.pareto(1.3, k) + 1.0),
                MODERATOR: 1.0,
            }
        ),  # fmt: skip
        p_answer=by_type({LURKER: 0.05, REGULAR: 0.12, BROADCASTER: 0.02, MODERATOR: 0.35}),
        appeal=by_type(
            {
                LURKER: 0.02,
                REGULAR: lambda k: rng.lognormal(np.log(0.3), 1.0, k),
                BROADCASTER: lambda k: 10.0 * (rng.pareto(1.1, k) + 1.0),
                MODERATOR: 3.0,
            }
        ),  # fmt: skip
        follow_rate=by_type({LURKER: 0.08, REGULAR: 0.2, BROADCASTER: 0.05, MODERATOR: 0.05}),
        friends=np.zeros(0),
        n_friends=np.zeros(0),
    )
    people.friends, people.n_friends = _friends(rng, archetype, topic, joined, topics)
    return people, topics


class Forum:
    """The forum world the planting director runs."""

    style = STYLE
    rhythm = RHYTHM

    def __init__(self, rng, members: int, weeks: int, newcomer_rate: float):
        self.people, self.topics = draw_people(rng, members, weeks, newcomer_rate)
        p = self.people
        sections = len(SECTIONS)
        self.members = Members(
            prefix="u-",
            initial=members,
            archetype=p.archetype,
            archetype_names=ARCHETYPE_NAMES,
            community=p.topic,
            community_names=[topic_name(t) for t in range(self.topics)],
            community_zone=np.arange(self.topics) % sections,
            zone_names=SECTIONS,
            reach=np.eye(sections, dtype=bool),
            joined=p.joined,
            away_prone=np.isin(p.archetype, (LURKER, REGULAR)),
        )
        self.followed = np.zeros(0, np.int64)

    def ordinary(self, rng, week, week_start, mult, log: EventLog) -> None:
        p = self.people
        n = len(p.topic)
        present = p.joined <= week
        active = present & (rng.random(n) < p.p_active)
        count = rng.poisson(p.rate * mult)
        count[p.archetype == LURKER] += 1  # an active lurker writes at least once
        count[~active] = 0
        self._replies(rng, count, present, mult, week_start, log)
        self._mentions(rng, active, mult, week_start, log)
        self._follows(rng, present, mult, week, week_start, log)

    def _threads(self, rng, where, present, mult):
        """Threads of the week per topic (author, heat) and the thread of each reply."""
        p = self.people
        thread = np.zeros(len(where), np.int64)
        authors, offset = [], 0
        for t in range(self.topics):
            mine = np.flatnonzero(where == t)
            if len(mine) == 0:
                continue
            k = 1 + int(rng.poisson(len(mine) / 6))
            pool = np.flatnonzero(present & ((p.topic == t) | (p.topic2 == t)))
            weight = p.author_weight[pool] * mult[pool]
            authors.append(rng.choice(pool, size=k, p=weight / weight.sum()))
            heat = rng.pareto(1.8, k) + 1.0
            thread[mine] = offset + rng.choice(k, size=len(mine), p=heat / heat.sum())
            offset += k
        return thread, (np.concatenate(authors) if authors else np.zeros(0, np.int64)), offset

    def _replies(self, rng, count, present, mult, week_start, log: EventLog) -> None:
        p = self.people
        actor = np.repeat(np.arange(len(count)), count)
        second = (p.topic2[actor] >= 0) & (rng.random(len(actor)) < 0.3)
        where = np.where(second, p.topic2[actor], p.topic[actor])
        thread, author, threads = self._threads(rng, where, present, mult)
        order = np.argsort(thread, kind="stable")
        actor, thread = actor[order], thread[order]
        first = np.searchsorted(thread, np.arange(threads))
        size = np.bincount(thread, minlength=threads)
        other = actor[first[thread] + (rng.random(len(actor)) * size[thread]).astype(np.int64)]
        nested = (rng.random(len(actor)) < NESTED_SHARE) & (other != actor)
        target = np.where(nested, other, author[thread])
        ok = target != actor
        actor, target = actor[ok], target[ok]
        seconds = self.rhythm.times(rng, week_start, len(actor))
        kind = np.where(rng.random(len(actor)) < QUOTE_SHARE, QUOTE, REPLY)
        log.add(actor, target, seconds, kind, 1.0)
        chance = np.where(p.archetype[actor] == MODERATOR, 0.4, p.p_answer[target])
        back = rng.random(len(actor)) < chance
        answer_at = later(rng, seconds[back], week_start + WEEK_SECONDS)
        log.add(target[back], actor[back], answer_at, REPLY, 1.0)

    def _mentions(self, rng, active, mult, week_start, log: EventLog) -> None:
        p = self.people
        count = rng.poisson(0.3 * p.rate * mult) * (active & (p.n_friends > 0))
        actor = np.repeat(np.arange(len(count)), count)
        friend = p.friends[actor, rng.integers(0, np.maximum(p.n_friends[actor], 1))]
        seconds = self.rhythm.times(rng, week_start, len(actor))
        log.add(actor, friend, seconds, MENTION, 1.0)
        back = rng.random(len(actor)) < 0.15
        answer_at = later(rng, seconds[back], week_start + WEEK_SECONDS)
        log.add(friend[back], actor[back], answer_at, MENTION, 1.0)

    def _follows(self, rng, present, mult, week, week_start, log: EventLog) -> None:
        """One-off follows inside the topic, mostly of broadcasters; never twice."""
        p = self.people
        n = len(p.topic)
        count = rng.poisson(p.follow_rate * mult) * present
        count += (p.joined == week) * (1 + rng.poisson(2.0, n)) * (week > 0)
        actor = np.repeat(np.arange(n), count)
        target = np.zeros(len(actor), np.int64)
        for t in range(self.topics):
            mine = np.flatnonzero(p.topic[actor] == t)
            pool = np.flatnonzero(present & (p.topic == t))
            if len(mine) and len(pool):
                weight = p.appeal[pool] / p.appeal[pool].sum()
                target[mine] = rng.choice(pool, size=len(mine), p=weight)
        code = actor * n + target
        _, first = np.unique(code, return_index=True)
        fresh = np.zeros(len(code), dtype=bool)
        fresh[first] = True
        fresh &= (actor != target) & ~np.isin(code, self.followed)
        self.followed = np.union1d(self.followed, code[fresh])
        seconds = self.rhythm.times(rng, week_start, int(fresh.sum()))
        log.add(actor[fresh], target[fresh], seconds, FOLLOW, 1.0)

    def eligible(self, change: str) -> np.ndarray:
        a, p = self.people.archetype, self.people
        ordinary = np.isin(a, (LURKER, REGULAR))
        return {
            "takeover": ordinary,
            "contact_point": ordinary,
            "funnel": ordinary,
            "season": ordinary,
            "reversal": np.isin(a, (BROADCASTER, MODERATOR, REGULAR)),
            "bridge": np.isin(a, (REGULAR, MODERATOR)),
            "quiet": np.isin(a, (REGULAR, MODERATOR, BROADCASTER)),
            "volume_control": (a == REGULAR) & (p.rate >= 3) & (p.rate <= 8) & (p.n_friends >= 3),
        }[change]

    def steady_contacts(self, rng, account: int, avoid: np.ndarray):
        """Three to five friends it replies to and hears from (six in ten events sent)."""
        p = self.people
        mine = p.friends[account, : p.n_friends[account]]
        mine = np.array(list(dict.fromkeys(mine[~avoid[mine] & (mine != account)].tolist())))
        if len(mine) < 3:
            pool = np.flatnonzero(
                (p.topic == p.topic[account]) & (p.archetype == REGULAR) & (p.joined == 0)
            )
            pool = pool[~avoid[pool] & (pool != account) & ~np.isin(pool, mine)]
            mine = np.concatenate(
                [mine, rng.choice(pool, min(3 - len(mine), len(pool)), replace=False)]
            )
        return mine[:5].astype(np.int64), 0.6, float(np.clip(p.rate[account], 3.0, 8.0))


def generate(
    seed: int = 0,
    members: int = 3000,
    weeks: int = 16,
    training_weeks: int = 4,
    start: datetime = DEFAULT_START,
    *,
    season_week: int | None = None,
    instances: int | None = None,
    newcomer_rate: float = 0.01,
) -> Scenario:
    """Generate the fictional hobby forum (see the module docstring).

    Parameters are those of :func:`rolewatch.scenario.generate`; ``instances`` defaults to
    about one planted account per type per 300 members (10 at 3,000, at least 3).
    """
    return generate_world(
        Forum,
        name=NAME,
        description="hobby forum: replies, mentions and follows in topic communities (fictional)",
        kinds=KINDS,
        id_stem="fo",
        seed=seed,
        members=members,
        weeks=weeks,
        training_weeks=training_weeks,
        start=start,
        season_week=season_week,
        instances=instances,
        newcomer_rate=newcomer_rate,
    )
