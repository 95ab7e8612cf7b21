"""Alert headlines and readable measures on the real pipeline, checked against networkx.
Events: the fictional marketplace sample in fixtures/sample (invented)."""

from __future__ import annotations

import networkx as nx
import pytest

from rolewatch.config import load_settings
from rolewatch.engine.headline import LEADS, compose_headline, measure_moves, move_text
from rolewatch.engine.readable import MEASURES

from .conftest import sample_events
from .test_tie_history import _offline


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    settings = load_settings(
        database_url=f"sqlite:///{tmp_path_factory.mktemp('headlines') / 'unused.db'}",
        window_period="7d",
        window_span="7d",
        window_lateness="1h",
        training_windows=4,
        public_url="http://127.0.0.1:9",
    )
    events = sample_events()
    return events, [w for w in _offline(settings, events) if w.result.alerts]


def _window_graph(window) -> nx.DiGraph:
    G = nx.DiGraph()
    for actor, target in zip(window.events.actor, window.events.target, strict=True):
        if actor != target:
            G.add_edge(str(actor), str(target))
    return G


def test_every_alert_says_what_changed(measured):
    _events, windows = measured
    assert windows, "the sample raises alerts"
    for window in windows:
        for alert in window.result.alerts:
            evidence = alert.evidence
            assert evidence.change
            same = alert.role_before == alert.role_after
            text = compose_headline(
                "role A" if alert.role_before is not None else None,
                "role A" if same else "role B",
                same_role=same,
                change=evidence.change,
                baseline=evidence.baseline is not None,
            )
            assert "role A → role A" not in text
            measures = {m.measure: m for m in evidence.measures}
            moves = measure_moves(
                {name: m.before for name, m in measures.items()},
                {name: m.after for name, m in measures.items()},
                new_counterparts=evidence.activity.new_counterparts,
                new_counterparts_before=evidence.activity.new_counterparts_before,
                lead=LEADS.get(evidence.components.strongest or ""),
            )
            if moves:
                assert evidence.change.startswith(move_text(moves[0]))


def test_readable_measures_of_alerted_accounts_equal_networkx(measured):
    _events, windows = measured
    window = windows[-1]
    G = _window_graph(window)
    U = G.to_undirected()
    for alert in window.result.alerts:
        after = {m.measure: m.after for m in alert.evidence.measures}
        assert set(after) <= set(MEASURES)
        # Source: networkx DiGraph.out_degree / in_degree, networkx.clustering (undirected)
        assert after["out_degree"] == G.out_degree(alert.account)
        assert after["in_degree"] == G.in_degree(alert.account)
        assert after["clustering"] == pytest.approx(nx.clustering(U, alert.account), abs=1e-4)
