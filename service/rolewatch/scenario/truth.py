"""Which accounts change, how and when: the planted changes and negative controls.

The plan is drawn before any activity so that the weekly generator can act it out, and it
is the ground truth a detector is judged against. Planted changes (takeover, funnel,
reversal, bridge) and the volume controls start only after the training weeks, never in
the festive season week, and never in the last week so that each lasts at least two
windows. Newcomers join in any week after the first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .population import BUYER, COURIER, NEVER_TRADING, SELLER, SHOP, Population

CHANGES = ("takeover", "funnel", "reversal", "bridge", "volume_control", "newcomer")
PLANTED = CHANGES[:5]


@dataclass(frozen=True)
class Planted:
    """One planted account: its change, the first week it shows and, where it needs
    one, a partner (the shop whose buyers a reversed shop hands over to)."""

    account: int
    change: str
    week: int
    partner: int = -1


def change_weeks(weeks: int, training_weeks: int, season_week: int) -> list[int]:
    """Weeks a planted change may start in."""
    return [w for w in range(training_weeks, weeks - 1) if w != season_week]


def draw_plan(
    rng: np.random.Generator,
    pop: Population,
    members: int,
    weeks: int,
    training_weeks: int,
    season_week: int,
    instances: int,
) -> list[Planted]:
    """Pick disjoint accounts for each planted change and the week it starts."""
    candidates = change_weeks(weeks, training_weeks, season_week)
    if not candidates:
        raise ValueError(
            f"weeks={weeks} leaves no week for planted changes after {training_weeks} "
            f"training weeks; use weeks >= training_weeks + 3"
        )
    initial = np.arange(pop.size) < members
    taken = np.zeros(pop.size, dtype=bool)
    arche, rate = pop.archetype, pop.rate

    def pick(mask: np.ndarray, count: int, prefer=None) -> np.ndarray:
        pool = np.flatnonzero(mask & initial & ~taken)
        if prefer is not None:
            pool = pool[np.argsort(-prefer[pool], kind="stable")][
                : max(count, min(len(pool) // 2, 2 * count))
            ]
        chosen = rng.choice(pool, size=min(count, len(pool)), replace=False)
        taken[chosen] = True
        return chosen

    def when(count: int) -> np.ndarray:
        return np.sort(rng.choice(candidates, size=count, replace=count > len(candidates)))

    plan: list[Planted] = []
    quiet = (arche == BUYER) & (rate >= 0.6) & (rate <= 2.0)
    for a, w in zip(pick(quiet, instances), when(instances), strict=False):
        plan.append(Planted(int(a), "takeover", int(w)))

    ordinary = ((arche == BUYER) | (arche == SELLER)) & (rate >= 0.4)
    for a, w in zip(pick(ordinary, instances), when(instances), strict=False):
        plan.append(Planted(int(a), "funnel", int(w)))

    shops = arche == SHOP
    for h in range(3):  # leave every neighbourhood at least one shop that keeps selling
        local = np.flatnonzero(shops & (pop.neighbourhood == h))
        taken[local[np.argmax(pop.popularity[local])]] = True
    keepers = taken & shops
    for a, w in zip(pick(shops, instances, prefer=pop.popularity), when(instances), strict=False):
        local = np.flatnonzero(keepers & (pop.neighbourhood == pop.neighbourhood[a]))
        plan.append(Planted(int(a), "reversal", int(w), partner=int(local[0])))

    edge = (arche == COURIER) & np.isin(pop.neighbourhood, NEVER_TRADING)
    for a, w in zip(pick(edge, instances), when(instances), strict=False):
        plan.append(Planted(int(a), "bridge", int(w)))

    steady = (arche == BUYER) & (rate >= 2.5) & (rate <= 6.0)
    for a, w in zip(pick(steady, instances), when(instances), strict=False):
        plan.append(Planted(int(a), "volume_control", int(w)))
    return plan


def truth_records(plan: list[Planted], pop: Population, members: int, window_start) -> list[dict]:
    """Ground-truth records, ordered by window, change and account."""
    rows = [(p.week, CHANGES.index(p.change), p.account) for p in plan]
    rows += [(int(pop.joined[i]), CHANGES.index("newcomer"), i) for i in range(members, pop.size)]
    return [
        {
            "account": f"m-{account:05d}",
            "change": CHANGES[change],
            "window_index": week,
            "window_start": window_start(week),
        }
        for week, change, account in sorted(rows)
    ]
