"""New-counterparts baseline, checked against networkx neighbourhoods window by window."""

from __future__ import annotations

import networkx as nx
import numpy as np

from rolewatch.evaluation import WEEK_US, new_counterpart_scores, top_budget

T0 = 1_700_006_400 * 1_000_000 // WEEK_US * WEEK_US


def test_counts_match_networkx_neighbourhoods_over_known_history():
    rng = np.random.default_rng(11)
    n = 800
    time = T0 + rng.integers(0, 7 * WEEK_US, n)
    actor = rng.integers(0, 60, n).astype(str)
    target = rng.integers(0, 60, n).astype(str)
    target[:10] = actor[:10]  # self-events are no counterpart
    result = new_counterpart_scores(time, actor, target, period_us=WEEK_US)
    window = (time // WEEK_US + 1) * WEEK_US
    known = nx.Graph()  # every pair that ever exchanged an event, either direction
    active_before: dict[str, int] = {}
    for end in np.unique(window):
        keep = window == end
        g = nx.MultiDiGraph()
        g.add_edges_from(zip(actor[keep], target[keep], strict=True))
        rows = result.window(int(end))
        assert sorted(rows.account.tolist()) == sorted(g.nodes)
        for i, account in enumerate(rows.account):
            # Reference: networkx predecessors and successors of the account in the window
            others = (set(g.predecessors(account)) | set(g.successors(account))) - {account}
            before = set(known.neighbors(account)) if account in known else set()
            new = others - before
            assert rows.detail["counterparts"][i] == len(others)
            assert rows.detail["new"][i] == len(new)
            assert rows.detail["history"][i] == active_before.get(account, 0)
            if active_before.get(account, 0) == 0:
                assert np.isnan(rows.score[i])
            else:
                assert rows.score[i] == len(new)
                assert np.isclose(rows.tiebreak[i], len(new) / len(others) if others else 0.0)
        known.add_edges_from((a, b) for a, b in g.edges() if a != b)
        for account in g.nodes:
            active_before[account] = active_before.get(account, 0) + 1


def test_fan_out_to_strangers_tops_the_window_and_repeat_contacts_do_not():
    rows = []
    for w in range(4):
        for k in range(5):
            rows.append((T0 + w * WEEK_US + k, "quiet", f"friend{k}"))
            rows.append((T0 + w * WEEK_US + 10 + k, "busy", f"client{k}"))
    # window 4: "quiet" writes to 40 accounts it never met; "busy" triples its volume with
    # the same five clients
    for k in range(40):
        rows.append((T0 + 4 * WEEK_US + k, "quiet", f"stranger{k}"))
    for k in range(15):
        rows.append((T0 + 4 * WEEK_US + 100 + k, "busy", f"client{k % 5}"))
    time, actor, target = (np.array(c) for c in zip(*rows, strict=True))
    result = new_counterpart_scores(time, actor, target, period_us=WEEK_US)
    last = result.window(T0 + 5 * WEEK_US)
    by_account = dict(zip(last.account, last.score, strict=True))
    assert by_account["quiet"] == 40 and by_account["busy"] == 0
    alert = top_budget(last, quotas={T0 + 5 * WEEK_US: 1})
    assert last.account[alert].tolist() == ["quiet"]
