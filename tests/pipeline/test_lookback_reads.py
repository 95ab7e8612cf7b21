"""The look-back is folded into the accounts' history one window at a time: each earlier
window is taken once, newest first, and let go before the next is read, with the same
history as from windows all held at once. Checked against plain definitions written here
(no outside source: the rules are the product's)."""

from __future__ import annotations

import weakref
from collections.abc import Sequence

import numpy as np
import pytest

from rolewatch.pipeline.history import account_history
from rolewatch.pipeline.loading import PastWindow
from rolewatch.store.alerts import WindowRef

ROLES = 3


def _window(rng: np.random.Generator, step: int, pool: list[str]) -> PastWindow:
    accounts = np.array(sorted(rng.choice(pool, size=40, replace=False)), dtype=object)
    n = accounts.size
    mixture = rng.dirichlet(np.ones(ROLES), size=n)
    mixture[rng.random(n) < 0.1] = np.nan  # too little activity to fit a role there
    events = rng.integers(1, 30, n).astype(np.float64)
    ties = rng.integers(0, 5, (n, 4)).astype(np.float64)
    ties[rng.random(n) < 0.2] = np.nan  # tie counts unknown
    return PastWindow(
        accounts=accounts,
        mixture=mixture,
        events=events,
        events_out=np.floor(events / 2),
        counterparts=rng.integers(1, 9, n).astype(np.float64),
        new_counterparts=rng.integers(0, 3, n).astype(np.float64),
        ties=ties,
        community=rng.integers(-1, 4, n),
        ref=WindowRef(id=step + 1, start=f"start-{step}", end=f"end-{step}"),
    )


class _ReadOnce(Sequence[PastWindow]):
    """Earlier windows handed out as fresh copies (as a store read gives them), noting
    the order they are taken in and which handed-out copies are still alive."""

    def __init__(self, windows: list[PastWindow]) -> None:
        self.windows = windows
        self.taken: list[int] = []
        self.alive_at_read: list[int] = []
        self._handed: list[weakref.ref] = []

    def __len__(self) -> int:
        return len(self.windows)

    def __getitem__(self, step):  # type: ignore[override]
        if isinstance(step, slice):
            raise TypeError("the history takes windows one at a time")
        step = range(len(self.windows))[step]
        self.taken.append(step)
        self.alive_at_read.append(sum(ref() is not None for ref in self._handed))
        original = self.windows[step]
        fresh = PastWindow(
            **{
                name: (value.copy() if isinstance(value, np.ndarray) else value)
                for name, value in vars(original).items()
            }
        )
        self._handed.append(weakref.ref(fresh))
        return fresh


@pytest.mark.parametrize("mode", ["previous", "mean", "ewm"])
def test_each_window_is_taken_once_newest_first_and_let_go_before_the_next(mode):
    rng = np.random.default_rng(11)
    pool = [f"acct-{i}" for i in range(90)]
    windows = [_window(rng, step, pool) for step in range(8)]
    nodes = np.array(sorted(rng.choice(pool, size=50, replace=False)), dtype=object)
    lazily = _ReadOnce(windows)

    folded = account_history(nodes, lazily, n_roles=ROLES, mode=mode, novelty_windows=4)
    held = account_history(nodes, windows, n_roles=ROLES, mode=mode, novelty_windows=4)

    assert lazily.taken == list(range(7, -1, -1))
    assert lazily.alive_at_read == [0] * 8  # no earlier window is held while one is read
    for name in vars(held):
        if name in ("windows", "gone"):
            continue
        np.testing.assert_array_equal(getattr(folded, name), getattr(held, name), err_msg=name)
    assert folded.windows == held.windows
    assert folded.gone == held.gone


def test_window_facts_and_the_accounts_gone_since_the_latest_window():
    rng = np.random.default_rng(5)
    pool = [f"acct-{i}" for i in range(90)]
    windows = [_window(rng, step, pool) for step in range(3)]
    nodes = np.array(sorted(rng.choice(pool, size=50, replace=False)), dtype=object)

    history = account_history(nodes, windows, n_roles=ROLES)

    assert [facts.ref for facts in history.windows] == [w.ref for w in windows]
    assert [facts.accounts for facts in history.windows] == [len(w.accounts) for w in windows]
    # each event is stored twice (once for its actor, once for its target)
    assert [facts.events for facts in history.windows] == [
        round(sum(w.events) / 2) for w in windows
    ]
    active = set(nodes.tolist())
    assert history.gone == sum(account not in active for account in windows[-1].accounts)
    for row, node in enumerate(nodes):  # the baseline window: the latest one holding it
        holding = [step for step, w in enumerate(windows) if node in set(w.accounts)]
        assert history.window[row] == (holding[-1] if holding else -1)


def test_accounts_gone_counts_every_row_of_a_window_that_lists_an_account_twice():
    rows = ["a", "b", "b", "c"]
    window = PastWindow(
        accounts=np.array(rows, dtype=object), mixture=np.ones((4, 1)), events=np.ones(4)
    )
    history = account_history(np.array(["a"], dtype=object), [window], n_roles=1)
    assert history.gone == 3
    assert account_history(np.array([], dtype=object), [window], n_roles=1).gone == 4
