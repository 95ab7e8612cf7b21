"""Each account's row in an earlier window, found by a hash index of that window's accounts,
against a plain dictionary of first rows (no outside source: the rule is the product's)."""

from __future__ import annotations

import numpy as np

from rolewatch.pipeline.history import _rows_in
from rolewatch.pipeline.loading import PastWindow


def _window(accounts) -> PastWindow:
    n = len(accounts)
    return PastWindow(
        accounts=np.array(accounts, dtype=object), mixture=np.ones((n, 1)), events=np.ones(n)
    )


def _first_rows(accounts, nodes) -> list[int]:
    first: dict[str, int] = {}
    for row, account in enumerate(accounts):
        first.setdefault(account, row)
    return [first.get(node, -1) for node in nodes]


def test_rows_of_present_absent_and_repeated_accounts():
    rng = np.random.default_rng(4)
    pool = [f"a-{i}" for i in range(300)] + ["x" * 200, "é-ü", ""]
    for repeated in (False, True):
        accounts = list(rng.permutation(pool)[:200])
        if repeated:  # a window should not list an account twice; the first row counts
            accounts += accounts[:20]
        nodes = np.array(list(rng.permutation(pool)[:150]) + ["nobody"], dtype=object)
        found = _rows_in(_window(accounts), nodes)
        assert found.tolist() == _first_rows(accounts, nodes.tolist())


def test_empty_window_or_no_nodes():
    nodes = np.array(["a", "b"], dtype=object)
    assert _rows_in(_window([]), nodes).tolist() == [-1, -1]
    assert _rows_in(_window(["a"]), np.array([], dtype=object)).tolist() == []
