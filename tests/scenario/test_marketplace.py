"""Checks of the demo scenario generator.

The scenario is invented data, so these are self-consistency checks: the events really
show the pattern the ground truth claims, in the window it claims. The thresholds follow
from how the generator is built (e.g. a takeover pays at least 20 fresh accounts a week),
not from any outside source. Graph measures that do not come from this project
(modularity, clustering, reciprocity) are computed with networkx as the measuring tool.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import networkx as nx
import numpy as np
import pytest

from rolewatch.scenario import KINDS, PLANTED, generate, write

ROOT = Path(__file__).resolve().parents[2]

SAMPLE = ROOT / "fixtures" / "sample"
WEEK = 7 * 24 * 3600


@pytest.fixture(scope="module")
def default():
    return generate(seed=0)


@pytest.fixture(scope="module")
def sample():
    return generate(seed=7, members=400, weeks=10)


@pytest.fixture(params=["default", "sample"])
def scenario(request):
    return request.getfixturevalue(request.param)


class View:
    """Per-window lookups over a scenario's events."""

    def __init__(self, sc):
        ev = sc.events
        start = int(datetime.fromisoformat(sc.meta["start"]).timestamp())
        self.window = (ev.time.astype("int64") - start) // WEEK
        self.actor, self.target = ev.actor, ev.target
        self.sc = sc
        self.nbh = dict(
            zip(sc.accounts["id"].tolist(), sc.accounts["neighbourhood"].tolist(), strict=False)
        )

    def out(self, account, window):
        return self.target[(self.actor == account) & (self.window == window)]

    def into(self, account, window):
        return self.actor[(self.target == account) & (self.window == window)]

    def counterparts(self, account, windows):
        mask = np.isin(self.window, list(windows))
        return set(self.target[mask & (self.actor == account)].tolist()) | set(
            self.actor[mask & (self.target == account)].tolist()
        )

    def new_out(self, account, window):
        return set(self.out(account, window).tolist()) - self.counterparts(account, range(window))

    def new_in(self, account, window):
        return set(self.into(account, window).tolist()) - self.counterparts(account, range(window))


def planted(sc, change):
    return [r for r in sc.truth if r["change"] == change]


# determinism -------------------------------------------------------------------------


def _files(directory):
    return {p.name: p.read_bytes() for p in sorted(Path(directory).iterdir())}


def test_same_seed_gives_identical_bytes(tmp_path):
    write(generate(seed=3, members=300, weeks=8), tmp_path / "a")
    write(generate(seed=3, members=300, weeks=8), tmp_path / "b")
    a, b = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert set(a) == {"events.ndjson", "events.csv", "truth.json", "accounts.csv"}
    assert a == b


def test_different_seed_gives_different_events(tmp_path):
    write(generate(seed=3, members=300, weeks=8), tmp_path / "a")
    write(generate(seed=4, members=300, weeks=8), tmp_path / "b")
    a, b = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert a["events.ndjson"] != b["events.ndjson"]
    assert a["truth.json"] != b["truth.json"]


def test_sample_files_match_the_generator(tmp_path):
    meta = json.loads((SAMPLE / "truth.json").read_text())["meta"]
    assert (meta["seed"], meta["members"], meta["weeks"]) == (7, 400, 10)
    write(generate(seed=7, members=400, weeks=10), tmp_path)
    assert _files(SAMPLE) == _files(tmp_path), (
        "fixtures/sample drifted from the generator; rebuild it with "
        "python fixtures/generate.py --seed 7 --members 400 --weeks 10 --out fixtures/sample"
    )
    total = sum(p.stat().st_size for p in SAMPLE.iterdir())
    assert total < 3_000_000


def test_sample_has_planted_changes_after_training(sample):
    changes = {r["change"] for r in sample.truth if r["window_index"] >= 4}
    assert {"takeover", "volume_control"} <= changes


# wire format (README.md, "Posting events") ----------------------------------------


def test_every_event_is_valid_wire_format(scenario):
    start = datetime.fromisoformat(scenario.meta["start"])
    end = datetime.fromisoformat(scenario.meta["end"])
    ids, previous = set(), start
    for event in scenario.iter_events():
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
        assert event["kind"] in KINDS and len(event["kind"]) <= 64
        assert isinstance(event["weight"], float)
        assert math.isfinite(event["weight"]) and event["weight"] >= 0
    assert len(ids) == len(scenario.events) == scenario.meta["events"]


def test_written_files_hold_the_same_events(tmp_path, sample):
    write(sample, tmp_path)
    lines = (tmp_path / "events.ndjson").read_text().splitlines()
    assert [json.loads(line) for line in lines] == list(sample.iter_events())
    csv_lines = (tmp_path / "events.csv").read_text().splitlines()
    assert csv_lines[0] == "id,time,actor,target,kind,weight"
    assert len(csv_lines) == len(lines) + 1
    first = list(sample.iter_events())[0]
    assert csv_lines[1].split(",") == [str(first[k]) for k in first]


def test_default_size_and_account_ids(default):
    assert 100_000 <= len(default.events) <= 250_000
    ids = set(default.events.actor.tolist()) | set(default.events.target.tolist())
    assert all(i.startswith(("m-", "new-")) for i in ids)
    assert default.meta["members"] == 3000 and default.meta["weeks"] == 16


def test_start_must_be_on_a_window_boundary():
    monday = datetime(2026, 1, 5, tzinfo=UTC)
    with pytest.raises(ValueError, match="2026-01-01T00:00:00"):
        generate(members=300, weeks=8, start=monday)
    later = generate(members=300, weeks=8, start=datetime(2026, 1, 8, tzinfo=UTC))
    assert later.meta["start"] == "2026-01-08T00:00:00Z"


# ground truth -------------------------------------------------------------------------


def test_truth_windows_are_aligned_and_after_training(scenario):
    meta = scenario.meta
    start = datetime.fromisoformat(meta["start"])
    assert int(start.timestamp()) % WEEK == 0  # 7-day windows from the Unix epoch
    for record in scenario.truth:
        assert set(record) == {"account", "change", "window_index", "window_start"}
        assert datetime.fromisoformat(record["window_start"]) == start + timedelta(
            weeks=record["window_index"]
        )
        if record["change"] in PLANTED:
            assert meta["training_weeks"] <= record["window_index"] <= meta["weeks"] - 2
            assert record["window_index"] != meta["season_window"]
    planted_accounts = [r["account"] for r in scenario.truth if r["change"] in PLANTED]
    assert len(planted_accounts) == len(set(planted_accounts))
    for change in PLANTED:
        records = planted(scenario, change)
        assert 2 <= len(records) <= 6
        if len(records) >= 2:
            assert len({r["window_index"] for r in records}) >= 2


def test_planted_accounts_have_a_baseline(scenario):
    view = View(scenario)
    for r in scenario.truth:
        if r["change"] in PLANTED:
            w = r["window_index"]
            assert len(view.out(r["account"], w - 1)) + len(view.into(r["account"], w - 1)) > 0


def test_takeover_pays_dozens_of_new_accounts(scenario):
    view = View(scenario)
    for r in planted(scenario, "takeover"):
        a, w = r["account"], r["window_index"]
        assert len(view.new_out(a, w - 1)) <= 3
        assert len(view.new_out(a, w)) >= 20
        assert len(view.new_out(a, w + 1)) >= 20


def test_funnel_collects_from_a_fresh_ring_and_forwards_to_few(scenario):
    view = View(scenario)
    for r in planted(scenario, "funnel"):
        a, w = r["account"], r["window_index"]
        assert len(view.new_in(a, w - 1)) <= 3
        fresh_payers = {x for x in view.new_in(a, w) if x.startswith("new-")}
        assert len(fresh_payers) >= 10
        outside = {x for x in view.out(a, w).tolist() if x.startswith("new-")}
        assert 1 <= len(outside) <= 5


def test_reversal_shop_stops_selling_and_buys(scenario):
    view = View(scenario)
    for r in planted(scenario, "reversal"):
        a, w = r["account"], r["window_index"]
        assert len(view.into(a, w - 1)) >= 10
        assert len(view.into(a, w)) == 0 and len(view.into(a, w + 1)) == 0
        assert len(set(view.out(a, w).tolist())) >= 5
        assert len(set(view.out(a, w).tolist())) > len(set(view.out(a, w - 1).tolist()))


def test_bridge_links_neighbourhoods_that_never_traded(scenario):
    view = View(scenario)
    never = set(scenario.meta["never_trading"])
    bridges = {r["account"]: r["window_index"] for r in planted(scenario, "bridge")}
    for a, w in bridges.items():
        far = (never - {view.nbh[a]}).pop()
        before = [x for x in view.counterparts(a, range(w)) if view.nbh[x] == far]
        after = [x for x in view.counterparts(a, [w]) if view.nbh[x] == far]
        assert before == [] and len(after) >= 3
    # Outside the planted bridges, the two neighbourhoods never touch.
    nbh = np.array([view.nbh[x] for x in scenario.accounts["id"].tolist()])
    index = {x: i for i, x in enumerate(scenario.accounts["id"].tolist())}
    a_n = nbh[[index[x] for x in view.actor.tolist()]]
    t_n = nbh[[index[x] for x in view.target.tolist()]]
    crossing = np.flatnonzero(np.isin(a_n, list(never)) & np.isin(t_n, list(never)) & (a_n != t_n))
    for i in crossing:
        courier = view.actor[i] if view.actor[i] in bridges else view.target[i]
        assert courier in bridges and view.window[i] >= bridges[courier]


def test_volume_control_keeps_counterparts_and_triples(scenario):
    view = View(scenario)
    season, weeks = scenario.meta["season_window"], scenario.meta["weeks"]
    for r in planted(scenario, "volume_control"):
        a, w = r["account"], r["window_index"]
        assert view.counterparts(a, range(w, weeks)) <= view.counterparts(a, range(w))
        counts = np.bincount(view.window[view.actor == a], minlength=weeks)
        after = [counts[k] for k in range(w, weeks) if k != season]
        before = [counts[k] for k in range(w) if k != season]
        assert 2.0 <= np.mean(after) / np.mean(before) <= 4.5


def test_season_window_raises_ordinary_activity_by_half(scenario):
    view = View(scenario)
    s = scenario.meta["season_window"]
    special = {r["account"] for r in scenario.truth if r["change"] in PLANTED}
    ordinary = ~(
        np.isin(view.actor, list(special))
        | np.isin(view.target, list(special))
        | np.char.startswith(view.actor.astype(str), "new-")
        | np.char.startswith(view.target.astype(str), "new-")
    )
    counts = np.bincount(view.window[ordinary], minlength=scenario.meta["weeks"])
    ratio = counts[s] / np.mean([counts[s - 1], counts[s + 1]])
    assert 1.35 <= ratio <= 1.65  # tolerance for Poisson noise and newcomer growth


def test_newcomers_first_appear_in_their_window(scenario):
    view = View(scenario)
    first = {}
    for side in (view.actor, view.target):
        for account, window in zip(side.tolist(), view.window.tolist(), strict=False):
            first[account] = min(first.get(account, window), window)
    newcomers = planted(scenario, "newcomer")
    assert newcomers
    members = scenario.meta["members"]
    for r in newcomers:
        assert int(r["account"][2:]) >= members
        assert first[r["account"]] == r["window_index"]


# graph structure, measured with networkx ----------------------------------------------


def _training_graph(sc):
    view = View(sc)
    mask = view.window < sc.meta["training_weeks"]
    graph = nx.Graph()
    graph.add_edges_from(zip(view.actor[mask].tolist(), view.target[mask].tolist(), strict=False))
    return graph, view


def test_neighbourhoods_are_communities(sample):
    graph, view = _training_graph(sample)
    groups = {}
    for node in graph:
        groups.setdefault(view.nbh[node], set()).add(node)
    # Modularity computed by networkx.community.modularity; 0.4 as the mark of clear
    # community structure is common practice, no source.
    assert nx.community.modularity(graph, groups.values()) >= 0.4


def test_friend_circles_are_reciprocal_and_clustered(sample):
    graph, view = _training_graph(sample)
    directed = nx.DiGraph()
    mask = view.window < sample.meta["training_weeks"]
    directed.add_edges_from(
        zip(view.actor[mask].tolist(), view.target[mask].tolist(), strict=False)
    )
    arche = dict(
        zip(sample.accounts["id"].tolist(), sample.accounts["archetype"].tolist(), strict=False)
    )
    reciprocity = nx.reciprocity(directed, list(directed))
    clustering = nx.clustering(graph)

    def mean(values, kind):
        return np.mean([values[n] for n in graph if arche[n] == kind])

    others = ("occasional_buyer", "small_seller", "busy_shop", "courier")
    assert mean(reciprocity, "friend_circle") > 0.25
    assert all(mean(reciprocity, "friend_circle") > 3 * mean(reciprocity, k) for k in others)
    # Buyers close triangles through their courier and seller, so compare with the hubs.
    assert mean(clustering, "friend_circle") > 0.3
    assert mean(clustering, "friend_circle") > 3 * max(
        mean(clustering, "busy_shop"), mean(clustering, "courier")
    )


def test_shops_have_many_buyers_and_couriers_link_many(sample):
    graph, view = _training_graph(sample)
    arche = dict(
        zip(sample.accounts["id"].tolist(), sample.accounts["archetype"].tolist(), strict=False)
    )
    degree = dict(graph.degree())
    mean = {
        k: np.mean([degree[n] for n in graph if arche[n] == k])
        for k in ("occasional_buyer", "small_seller", "busy_shop", "courier")
    }
    assert mean["busy_shop"] > 3 * mean["small_seller"]
    assert mean["courier"] > 3 * mean["occasional_buyer"]


# the command-line wrapper ----------------------------------------------------------------


def test_generate_script_writes_files_and_rejects_bad_settings(tmp_path):
    script = str(ROOT / "fixtures" / "generate.py")
    done = subprocess.run(
        [
            sys.executable,
            script,
            "--seed",
            "2",
            "--members",
            "250",
            "--weeks",
            "8",
            "--out",
            str(tmp_path),
        ],
        capture_output=True,
        text=True,
    )
    assert done.returncode == 0, done.stderr
    assert (
        json.loads(done.stdout)["events"] == generate(seed=2, members=250, weeks=8).meta["events"]
    )
    assert (tmp_path / "events.ndjson").stat().st_size > 0
    bad = subprocess.run(
        [sys.executable, script, "--weeks", "5", "--out", str(tmp_path / "x")],
        capture_output=True,
        text=True,
    )
    assert bad.returncode == 2 and "training_weeks + 3" in bad.stderr
