"""Checks shared by the tests of the forum, payments and guild-trading generators.

The scenarios are invented data, so most checks are self-consistency: the raw events
really show what the ground truth claims, in the window it claims. Every measure here is
computed from the generated event table with numpy, Python sets and networkx, and none of
it uses rolewatch's engine, so a check cannot pass because engine and generator share a
mistake. Thresholds follow from how the generators are built (the bounds are quoted from
rolewatch.scenario.planting beside each check), not from an outside source. The wire format
is the one in README.md ("Posting events"), checked the same way as for the marketplace.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta

import networkx as nx
import numpy as np

from rolewatch.scenario.plants import CHANGES, STRUCTURAL

WEEK = 7 * 24 * 3600
SMALL = {"members": 400, "weeks": 10}  # the small draw every test uses
PER_WINDOW_TYPES = STRUCTURAL + ("volume_control", "quiet")


class Events:
    """Per-window lookups over a scenario's raw events."""

    def __init__(self, sc):
        ev = sc.events
        self.sc, self.meta = sc, sc.meta
        start = int(datetime.fromisoformat(sc.meta["start"]).timestamp())
        self.window = (ev.time.astype("int64") - start) // WEEK
        self.actor, self.target, self.weight = ev.actor, ev.target, ev.weight
        self.zone = dict(zip(sc.accounts["id"].tolist(), sc.accounts["zone"].tolist(), strict=True))
        self.community = dict(
            zip(sc.accounts["id"].tolist(), sc.accounts["community"].tolist(), strict=True)
        )

    def mask(self, windows) -> np.ndarray:
        return np.isin(self.window, list(windows))

    def sent(self, account, windows) -> np.ndarray:
        return (self.actor == account) & self.mask(windows)

    def received(self, account, windows) -> np.ndarray:
        return (self.target == account) & self.mask(windows)

    def count(self, account, window) -> int:
        return int((self.sent(account, [window]) | self.received(account, [window])).sum())

    def counterparts(self, account, windows) -> set:
        return set(self.target[self.sent(account, windows)].tolist()) | set(
            self.actor[self.received(account, windows)].tolist()
        )

    def new_out(self, account, window) -> set:
        """Accounts it sent to in ``window`` that it never dealt with in earlier windows."""
        known = self.counterparts(account, range(window))
        return set(self.target[self.sent(account, [window])].tolist()) - known

    def new_in(self, account, window) -> set:
        known = self.counterparts(account, range(window))
        return set(self.actor[self.received(account, [window])].tolist()) - known

    def new_any(self, account, window) -> set:
        return self.counterparts(account, [window]) - self.counterparts(account, range(window))

    def usual_new(self, account, window) -> float:
        """Mean new counterparts a window over windows 1 .. window-1 (window 0 is all new)."""
        return float(np.mean([len(self.new_any(account, w)) for w in range(1, window)] or [0]))


def rows(sc, change: str) -> list[dict]:
    return [r for r in sc.truth if r["change"] == change]


def plants(sc, change: str) -> list[dict]:
    return [p for p in sc.meta["plants"] if p["change"] == change]


# determinism ---------------------------------------------------------------------------


def same_draw(a, b) -> bool:
    fields = ("id", "time", "actor", "target", "kind", "weight")
    same_events = all(np.array_equal(getattr(a.events, f), getattr(b.events, f)) for f in fields)
    same_accounts = all(np.array_equal(a.accounts[k], b.accounts[k]) for k in a.accounts)
    return same_events and same_accounts and a.truth == b.truth and a.meta == b.meta


def check_determinism(generate) -> None:
    """The same seed gives the same events, truth and meta; another seed does not."""
    first, again = generate(seed=3, **SMALL), generate(seed=3, **SMALL)
    assert same_draw(first, again)
    other = generate(seed=4, **SMALL)
    assert not np.array_equal(first.events.actor, other.events.actor)
    assert first.truth != other.truth


# wire format (README.md, "Posting events") ----------------------------------------


def check_wire_format(sc) -> None:
    start = datetime.fromisoformat(sc.meta["start"])
    end = datetime.fromisoformat(sc.meta["end"])
    ids, previous = set(), start
    for event in sc.iter_events():
        assert list(event) == ["id", "time", "actor", "target", "kind", "weight"]
        assert isinstance(event["id"], str) and 0 < len(event["id"]) <= 200
        assert event["id"] not in ids
        ids.add(event["id"])
        moment = datetime.fromisoformat(event["time"])
        assert event["time"].endswith("Z") and moment.utcoffset() == timedelta(0)
        assert previous <= moment < end
        previous = moment
        for side in ("actor", "target"):
            assert isinstance(event[side], str) and 0 < len(event[side]) <= 200
        assert event["actor"] != event["target"]
        assert event["kind"] in sc.meta["kinds"] and len(event["kind"]) <= 64
        assert isinstance(event["weight"], float)
        assert math.isfinite(event["weight"]) and event["weight"] >= 0
    assert len(ids) == len(sc.events) == sc.meta["events"]
    # windows are 7 days aligned to the Unix epoch (a Thursday), as the service aligns them
    assert int(start.timestamp()) % WEEK == 0


# ground truth --------------------------------------------------------------------------


def check_truth_types_and_windows(sc) -> None:
    """Every type is planted (at least 3 at 400 members) in an allowed window."""
    meta = sc.meta
    weeks, training, season = meta["weeks"], meta["training_weeks"], meta["season_window"]
    planted = {r["change"] for r in sc.truth}
    assert planted == set(CHANGES) == set(meta["changes"])
    for change in CHANGES:
        assert len(rows(sc, change)) >= 3, change
        assert meta["truth_counts"][change] == len(rows(sc, change))
    start = datetime.fromisoformat(meta["start"])
    for r in sc.truth:
        w = r["window_index"]
        assert datetime.fromisoformat(r["window_start"]) == start + timedelta(weeks=w)
        if r["change"] in PER_WINDOW_TYPES:
            # after training, never the season window, never the last window
            assert training <= w <= weeks - 2 and w != season, r
        elif r["change"] == "season":
            assert w == season
        else:
            assert 1 <= w < weeks
    accounts = [r["account"] for r in sc.truth]
    assert len(accounts) == len(set(accounts)), "planted accounts must be disjoint"


def check_truth_accounts_in_events(sc) -> None:
    """Truth accounts exist; planted ones have a baseline; newcomers start when they join."""
    ev = Events(sc)
    seen = set(ev.actor.tolist()) | set(ev.target.tolist())
    for r in sc.truth:
        assert r["account"] in seen, r
        if r["change"] == "newcomer":
            assert not ev.counterparts(r["account"], range(r["window_index"]))
            assert ev.count(r["account"], r["window_index"]) >= 1
        else:
            training = range(sc.meta["training_weeks"])
            assert all(ev.count(r["account"], w) >= 1 for w in training), r


# planted changes -----------------------------------------------------------------------


def check_takeover(sc) -> None:
    """Fan-out after takeover: from its window the account sends to many accounts it never
    dealt with (planting.TAKEOVER_NEW: at least 12), well above its own usual number of new
    counterparts a window, few of them answer (planting.ANSWER_SHARE: 8 % expected), and its
    events rise at least 1.5-fold (planting.TAKEOVER_FACTOR: 2 to 9 times)."""
    ev = Events(sc)
    news = []
    for r in rows(sc, "takeover"):
        a, w = r["account"], r["window_index"]
        new = ev.new_out(a, w)
        news.append(len(new))
        assert len(new) >= 12 and len(new) >= ev.usual_new(a, w) + 8, (r, len(new))
        answered = new & set(ev.actor[ev.received(a, [w])].tolist())
        assert len(answered) <= 0.3 * len(new), r
        before = np.mean([ev.count(a, k) for k in range(w)])
        assert ev.count(a, w) >= 1.5 * before, r
    # strengths vary from modest to heavy (stratified between 12 and 90 new counterparts;
    # in a small draw the heaviest are capped by the members of the account's zone)
    assert min(news) <= 40 and max(news) - min(news) >= 20, news


def check_takeover_prior_activity_varies(sc) -> None:
    """Taken-over accounts range from quiet to busy before (planting.TAKEOVER_PRIOR 1-15)."""
    ev = Events(sc)
    training = range(sc.meta["training_weeks"])
    prior = [np.mean([ev.count(r["account"], w) for w in training]) for r in rows(sc, "takeover")]
    assert min(prior) <= 3.5 and max(prior) >= 5.0, prior
    assert all(1.0 <= p <= 16.0 for p in prior), prior


def check_volume_controls(sc) -> None:
    """Volume controls keep exactly the counterparts they had in training and at least 1.5
    times their median events (planted 2 to 4 times, each window within +-20 %)."""
    ev = Events(sc)
    training = range(sc.meta["training_weeks"])
    for r in rows(sc, "volume_control"):
        a, w = r["account"], r["window_index"]
        assert not ev.new_any(a, w), r
        assert ev.counterparts(a, range(sc.meta["weeks"])) == ev.counterparts(a, training), r
        before = np.median([ev.count(a, k) for k in range(w)])
        assert ev.count(a, w) >= 1.5 * before, r


def check_contact_points(sc) -> None:
    """A new contact point receives from at least 20 accounts that never dealt with it
    (planting.CONTACT_NEW 20-70), far above its usual new counterparts, and answers few."""
    ev = Events(sc)
    for r in rows(sc, "contact_point"):
        a, w = r["account"], r["window_index"]
        new = ev.new_in(a, w)
        assert len(new) >= 20 and len(new) >= ev.usual_new(a, w) + 15, (r, len(new))
        answered = new & set(ev.target[ev.sent(a, [w])].tolist())
        assert len(answered) <= 0.3 * len(new), r


def check_funnels(sc) -> None:
    """The collector receives from a ring of new accounts (10-25, most of the weight it
    receives) and pays out to at most three new ones (plus its usual few)."""
    ev = Events(sc)
    for r in rows(sc, "funnel"):
        a, w = r["account"], r["window_index"]
        new_in, new_out = ev.new_in(a, w), ev.new_out(a, w)
        assert len(new_in) >= 8 and len(new_in) >= 2 * len(new_out), (r, new_in, new_out)
        got = ev.received(a, [w])
        from_new = np.isin(ev.actor[got], list(new_in))
        assert ev.weight[got][from_new].sum() >= 0.6 * ev.weight[got].sum(), r


def check_reversals(sc) -> None:
    """The share of events the account sends crosses one half and moves by at least 0.3,
    and it stays active (at least a quarter of its training volume over two windows)."""
    ev = Events(sc)
    training = list(range(sc.meta["training_weeks"]))

    def sent_share(account, windows):
        sent = ev.sent(account, windows).sum()
        return sent / max(sent + ev.received(account, windows).sum(), 1)

    for r in rows(sc, "reversal"):
        a, w = r["account"], r["window_index"]
        after = [w, w + 1]
        before_share, after_share = sent_share(a, training), sent_share(a, after)
        assert (before_share - 0.5) * (after_share - 0.5) < 0, (r, before_share, after_share)
        assert abs(after_share - before_share) >= 0.3, r
        volume = sum(ev.count(a, k) for k in after) / 2
        assert volume >= 0.25 * np.mean([ev.count(a, k) for k in training]), r


def check_bridges(sc) -> None:
    """From its window the broker deals with members of its own zone and of a zone its zone
    never dealt with; no account other than a planted broker ever links those two zones."""
    ev = Events(sc)
    never = {frozenset(pair) for pair in sc.meta["never_dealing"]}
    brokers = [r["account"] for r in rows(sc, "bridge")]
    others = ~np.isin(ev.actor, brokers) & ~np.isin(ev.target, brokers)
    zone_a = np.array([ev.zone[x] for x in ev.actor.tolist()])
    zone_t = np.array([ev.zone[x] for x in ev.target.tolist()])
    for r in rows(sc, "bridge"):
        a, w = r["account"], r["window_index"]
        home = ev.zone[a]
        zones = {ev.zone[c] for c in ev.counterparts(a, [w])}
        far = [z for z in zones if frozenset((home, z)) in never]
        assert home in zones and far, (r, zones)
        assert not ev.counterparts(a, range(w)) & {
            c for c in ev.counterparts(a, [w]) if ev.zone[c] in far
        }
        for z in far:
            linked = ((zone_a == home) & (zone_t == z)) | ((zone_a == z) & (zone_t == home))
            assert not (linked & others).any(), (r, z)


def check_quiet(sc) -> None:
    """A break is silent for its weeks and ends with events again; a fade keeps a trickle."""
    ev = Events(sc)
    training = range(sc.meta["training_weeks"])
    for p in plants(sc, "quiet"):
        a, w = p["account"], p["window_index"]
        before = np.mean([ev.count(a, k) for k in training])
        if p["mode"] == "break":
            back = p["back_window"]
            assert back - w >= 2 and back <= sc.meta["weeks"] - 2, p
            assert all(ev.count(a, k) == 0 for k in range(w, back)), p
            assert ev.count(a, back) >= 1, p
        else:
            after = [ev.count(a, k) for k in range(w, sc.meta["weeks"])]
            assert np.mean(after) <= 0.5 * before, (p, after, before)


def check_season(sc) -> None:
    """Ordinary events (between accounts no planted change touches, of kinds not paid on a
    fixed calendar such as salaries) in the season window are 1.2 to 2 times the median of
    the other windows after training (everybody's rate times 1.3-1.8), and the season's
    truth rows name accounts active in it."""
    ev = Events(sc)
    season = sc.meta["season_window"]
    changed = [r["account"] for r in sc.truth if r["change"] in PER_WINDOW_TYPES]
    touched = np.isin(ev.actor, changed) | np.isin(ev.target, changed)
    fresh = np.char.startswith(ev.actor.astype(str), "new-") | np.char.startswith(
        ev.target.astype(str), "new-"
    )
    fixed = np.isin(sc.events.kind, sc.meta["fixed_schedule_kinds"])
    counts = np.bincount(ev.window[~touched & ~fresh & ~fixed], minlength=sc.meta["weeks"])
    others = [counts[w] for w in range(sc.meta["training_weeks"], sc.meta["weeks"]) if w != season]
    assert 1.2 * np.median(others) <= counts[season] <= 2.0 * np.median(others)
    for r in rows(sc, "season"):
        assert ev.count(r["account"], season) >= 1, r


def check_activity_shape(sc) -> None:
    """Heavy-tailed activity (lognormal or Pareto rates: the 95th percentile of events per
    member at least three times the median) and bursty members who skip windows."""
    ev = Events(sc)
    initial = [i for i, w in zip(sc.accounts["id"], sc.accounts["joined_window"], strict=True)
               if w == 0 and not i.startswith("new-")]  # fmt: skip
    totals = np.array([np.sum(ev.actor == i) + np.sum(ev.target == i) for i in initial])
    assert np.percentile(totals, 95) >= 3 * np.median(totals)
    weeks = sc.meta["weeks"]
    active = np.zeros((len(initial), weeks), dtype=bool)
    index = {a: k for k, a in enumerate(initial)}
    for side in (ev.actor, ev.target):
        rows_ = np.array([index.get(a, -1) for a in side.tolist()])
        ok = rows_ >= 0
        active[rows_[ok], ev.window[ok]] = True
    skipping = active.any(axis=1) & ~active.all(axis=1)
    assert skipping.mean() >= 0.3, skipping.mean()


def check_daily_rhythm(sc) -> None:
    """Nights are quieter than early evenings (each scenario's hourly weights give the
    hours 17-19 between 7 and 10 times the weight of the hours 2-4)."""
    hours = (sc.events.time.astype("int64") % 86400) // 3600
    night = np.isin(hours, [2, 3, 4]).sum()
    evening = np.isin(hours, [17, 18, 19]).sum()
    assert evening >= 3 * night


# structure -----------------------------------------------------------------------------


def digraph(sc) -> nx.DiGraph:
    g = nx.DiGraph()
    g.add_edges_from(zip(sc.events.actor.tolist(), sc.events.target.tolist(), strict=True))
    return g


def structure(sc) -> dict[str, float]:
    """networkx measures of the whole run's graph between members (brand-new accounts a
    planted change creates are left out): reciprocity (nx.reciprocity), average clustering
    and degree assortativity of the undirected graph, the correlation of each account's
    in- and out-degree (accounts that both send and receive widely, or payers apart from
    payees), and the share of edges inside one community."""
    g = digraph(sc)
    g.remove_nodes_from([n for n in list(g) if n.startswith("new-")])
    u = g.to_undirected()
    nodes = list(g)
    in_degree = [g.in_degree(n) for n in nodes]
    out_degree = [g.out_degree(n) for n in nodes]
    community = dict(
        zip(sc.accounts["id"].tolist(), sc.accounts["neighbourhood"].tolist(), strict=True)
    )
    inside = [community[a] == community[b] != "" for a, b in u.edges()]
    return {
        "reciprocity": nx.reciprocity(g),
        "clustering": nx.average_clustering(u),
        "assortativity": nx.degree_assortativity_coefficient(u),
        "in_out_correlation": float(np.corrcoef(in_degree, out_degree)[0, 1]),
        "inside_community": float(np.mean(inside)),
    }
