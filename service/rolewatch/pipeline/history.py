"""Each account's past, as the scores and the evidence of one window need it.

The *baseline window* of an account is the most recent earlier window in which it was
active (within the look-back). Everything an alert shows as "before" comes from that one
window: its mixture and dominant role, its activity and tie counts, its features. The
role score compares with the baseline mixture the policy asks for (by default the same
window's); the novelty components estimate the account's rate of meeting new
counterparts from its last few active windows; the bridging component labels
counterparts by the communities of the latest measured window.

No database access: :class:`rolewatch.pipeline.loading.PastWindow` entries in, arrays
out, one row per node of the window being measured. The entries are taken newest first,
each once, and not kept: the closer's look-back reads each window from the store when it is
taken (:class:`rolewatch.pipeline.loading.StoredPastWindows`), so it holds one at a time.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from rolewatch.engine.shift import baseline_mixture
from rolewatch.pipeline.loading import PastWindow, PastWindowFacts

__all__ = ["AccountHistory", "account_history", "novelty_history"]


@dataclass(frozen=True)
class AccountHistory:
    """Per node of the window being measured (NaN / -1 where the account has no past).

    Attributes
    ----------
    window : int array
        Index into ``past`` of the account's baseline window (-1: none).
    row : int array
        The account's row in that window.
    window_mixture : (n, k) array
        The baseline window's mixture (NaN rows: no baseline, or too little activity
        there to fit a role).
    mixture : (n, k) array
        The baseline mixture the role score uses (the policy's baseline mode; in mode
        "previous" the very array ``window_mixture``, not a copy).
    events_out, events_in, counterparts, new_counterparts : arrays
        The baseline window's counts.
    cells : (n, 4) array
        The baseline window's tie cells (:data:`rolewatch.engine.ties.TIE_CELLS`).
    history_new : (n, 2) array
        New counterparts sent to / received from over the account's last active windows
        (at most ``novelty_windows``) whose tie counts are known.
    history_windows : array
        How many windows ``history_new`` sums.
    recent_new : (n, L, 2) array
        New counterparts sent to / received from in each of the account's last ``L``
        active windows with known tie counts, newest first (NaN-padded), from which
        ``history_new`` sums the first ``novelty_windows``.
    reference_community : int array
        The account's community in the latest measured window (-1: none).
    windows : tuple of PastWindowFacts
        Which window each index of ``window`` is, oldest first, with its counts.
    gone : int
        Accounts of the latest measured window not active in this one.
    """

    window: np.ndarray
    row: np.ndarray
    window_mixture: np.ndarray
    mixture: np.ndarray
    events_out: np.ndarray
    events_in: np.ndarray
    counterparts: np.ndarray
    new_counterparts: np.ndarray
    cells: np.ndarray
    history_new: np.ndarray
    history_windows: np.ndarray
    recent_new: np.ndarray
    reference_community: np.ndarray
    windows: tuple[PastWindowFacts, ...] = ()
    gone: int = 0


def _rows_in(window: PastWindow, nodes: np.ndarray) -> np.ndarray:
    """Row of each node in a past window (-1 where absent), by a hash index of the
    window's accounts (pandas), not a sort of them as fixed-width text."""
    return _rows_and_gone(window, nodes)[0]


def _rows_and_gone(window: PastWindow, nodes: np.ndarray) -> tuple[np.ndarray, int]:
    """:func:`_rows_in`, and how many of the window's rows hold an account that is not
    among ``nodes`` (the distinct accounts active now)."""
    import pandas as pd

    accounts = pd.Index(np.asarray(window.accounts, dtype=object))
    if accounts.size == 0 or nodes.size == 0:
        return np.full(nodes.size, -1, dtype=np.int64), int(accounts.size)
    if accounts.is_unique:  # each node is at most one row, each row at most one node
        rows = accounts.get_indexer(nodes).astype(np.int64)
        return rows, int(accounts.size - np.count_nonzero(rows >= 0))
    first = np.flatnonzero(~accounts.duplicated(keep="first"))  # an account's first row
    found = accounts[first].get_indexer(nodes)
    gone = int(np.count_nonzero(pd.Index(nodes).get_indexer(accounts) < 0))
    return np.where(found >= 0, first[found], -1).astype(np.int64), gone


def _column(window: PastWindow, name: str, rows: np.ndarray, width: int = 0) -> np.ndarray:
    """``window.<name>`` at ``rows`` (NaN where the window did not record it)."""
    values = getattr(window, name)
    shape = (rows.size, width) if width else (rows.size,)
    if values is None:
        return np.full(shape, np.nan)
    return np.asarray(values, dtype=np.float64)[rows]


def account_history(
    nodes: np.ndarray,
    past: Sequence[PastWindow],
    *,
    n_roles: int,
    mode: str = "previous",
    last_k: int = 4,
    half_life: float = 2.0,
    novelty_windows: int = 8,
) -> AccountHistory:
    """Gather every node's baseline window, novelty history and reference community.

    Parameters
    ----------
    nodes : array of str
        The accounts of the window being measured.
    past : sequence of PastWindow
        Earlier measured windows, oldest first (the look-back); each is taken once, newest
        first.
    n_roles : int
    mode, last_k, half_life :
        The role score's baseline (:func:`rolewatch.engine.shift.baseline_mixture`).
    novelty_windows : int
        Most earlier active windows summed into ``history_new``.
    """
    nodes = np.asarray(nodes, dtype=object)
    n = nodes.size
    out = _empty(n, n_roles, len(past))
    counted = np.zeros(n, dtype=np.int64)
    # every past window's mixtures side by side, only for a baseline that averages them
    # (windows x accounts x roles: gigabytes with a long look-back over millions of accounts)
    mixtures = None if mode == "previous" else np.full((len(past), n, n_roles), np.nan)
    facts: list[PastWindowFacts] = []
    gone = 0
    for step in range(len(past) - 1, -1, -1):  # newest first: a loop over windows only
        window = past[step]
        facts.append(window.facts())
        rows, absent = _rows_and_gone(window, nodes)
        if step == len(past) - 1:
            gone = absent
            _fill_reference_community(out, window, rows)
        here = np.flatnonzero(rows >= 0)
        if mixtures is not None:
            mixtures[step, here] = np.asarray(window.mixture)[rows[here]]
        first = here[out.window[here] < 0]
        _fill_baseline(out, window, step, first, rows[first], n_roles)
        cells = _column(window, "ties", rows[here], 4)
        known = np.isfinite(cells).all(axis=1)
        take = here[known]
        out.recent_new[take, counted[take]] = cells[known][:, [1, 3]]
        counted[take] += 1
        del window  # before the next window is read
    summed, windows = novelty_history(out.recent_new, novelty_windows)
    out.history_new[:] = summed
    out.history_windows[:] = windows
    out = replace(out, windows=tuple(reversed(facts)), gone=gone)
    if mixtures is None or not facts:
        return out  # the baseline is the baseline window's mixture itself (no copy)
    return replace(
        out, mixture=baseline_mixture(mixtures, mode=mode, last_k=last_k, half_life=half_life)
    )


def _fill_reference_community(out: AccountHistory, window: PastWindow, rows: np.ndarray) -> None:
    """Each node's community in ``window`` (the latest measured one), where it was there."""
    if window.community is not None:
        hit = rows >= 0
        out.reference_community[hit] = np.asarray(window.community, dtype=np.int64)[rows[hit]]


def novelty_history(recent_new: np.ndarray, windows: int) -> tuple[np.ndarray, np.ndarray]:
    """New counterparts (sent, received) summed over each account's last ``windows``
    active windows, and how many windows that is (``recent_new`` newest first)."""
    recent = np.asarray(recent_new, dtype=np.float64)[:, : max(int(windows), 0)]
    present = np.isfinite(recent).all(axis=2)
    return np.nansum(recent, axis=1), present.sum(axis=1).astype(np.float64)


def _empty(n: int, k: int, depth: int) -> AccountHistory:
    def nan(*shape: int) -> np.ndarray:
        return np.full(shape, np.nan)

    window_mixture = nan(n, k)
    return AccountHistory(
        window=np.full(n, -1, dtype=np.int64),
        row=np.full(n, -1, dtype=np.int64),
        window_mixture=window_mixture,
        mixture=window_mixture,  # until a baseline mode that averages windows replaces it
        events_out=nan(n),
        events_in=nan(n),
        counterparts=nan(n),
        new_counterparts=nan(n),
        cells=nan(n, 4),
        history_new=np.zeros((n, 2)),
        history_windows=np.zeros(n),
        recent_new=nan(n, depth, 2),
        reference_community=np.full(n, -1, dtype=np.int64),
    )


def _fill_baseline(
    out: AccountHistory, window: PastWindow, step: int, nodes: np.ndarray, rows: np.ndarray, k: int
) -> None:
    """Record ``window`` as the baseline window of ``nodes`` (at ``rows`` there)."""
    out.window[nodes] = step
    out.row[nodes] = rows
    out.window_mixture[nodes] = np.asarray(window.mixture, dtype=np.float64)[rows]
    events = np.asarray(window.events, dtype=np.float64)[rows]
    sent = _column(window, "events_out", rows)
    out.events_out[nodes] = sent
    out.events_in[nodes] = events - sent
    out.counterparts[nodes] = _column(window, "counterparts", rows)
    out.new_counterparts[nodes] = _column(window, "new_counterparts", rows)
    out.cells[nodes] = _column(window, "ties", rows, 4)
