"""The members of the fictional neighbourhood marketplace and their standing habits.

A population is drawn once per scenario: who each member is (archetype), where they live
(neighbourhood), how often they buy, which sellers they favour, which courier brings their
parcels, which suppliers a shop restocks from and which friends pay each other back.
Week-by-week activity is drawn from these habits in :mod:`rolewatch.scenario.marketplace`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

BUYER, SELLER, SHOP, COURIER, FRIEND, FRESH = range(6)
ARCHETYPE_NAMES = (
    "occasional_buyer",  # a few purchases a week from favourite sellers
    "small_seller",  # receives from a handful of buyers, sometimes buys
    "busy_shop",  # receives from many buyers, restocks from a few suppliers
    "courier",  # collects price + fee from buyers, pays sellers on their behalf
    "friend_circle",  # buys like a buyer and pays friends back (reciprocal, clustered)
    "fresh",  # brand-new account created by a planted change
)

NEIGHBOURHOOD_NAMES = ("north", "river", "hill")
NEIGHBOURHOOD_SHARES = (0.40, 0.35, 0.25)
# Trade crosses only between neighbouring areas: north-river and river-hill. North and
# hill never trade with each other, which is what a planted bridge changes.
ADJACENT = {0: (1,), 1: (0, 2), 2: (1,)}
NEVER_TRADING = (0, 2)

MAX_FAVOURITES = 8
MAX_SUPPLIERS = 4


@dataclass
class Population:
    """Standing attributes of every member, indexed by member number.

    Index ``i`` is the account ``m-{i:05d}``. Members ``0 .. members-1`` exist from the
    first week; later indices are newcomers who join in ``joined[i]``.
    """

    archetype: np.ndarray  # int8 codes, see ARCHETYPE_NAMES
    neighbourhood: np.ndarray  # int8 in 0..2
    joined: np.ndarray  # int week index the member first appears in
    rate: np.ndarray  # expected purchases per week (0 for shops and couriers)
    favourites: np.ndarray  # (n, MAX_FAVOURITES) seller indices
    n_favourites: np.ndarray  # how many leading columns of favourites are used
    courier: np.ndarray  # preferred courier index, -1 for shops and couriers
    p_deliver: np.ndarray  # chance a purchase goes through the courier
    p_explore: np.ndarray  # chance a purchase goes to a seller outside the favourites
    popularity: np.ndarray  # how often explorers pick this seller (0 for non-sellers)
    repairer: np.ndarray  # bool: a seller who mends things (its sales are "repair")
    suppliers: np.ndarray  # (n, MAX_SUPPLIERS) small sellers a shop restocks from
    n_suppliers: np.ndarray
    friend_pairs: np.ndarray  # (p, 2) ordered pairs inside friend circles

    @property
    def size(self) -> int:
        return len(self.archetype)

    def ids(self) -> list[str]:
        return [f"m-{i:05d}" for i in range(self.size)]

    def sellers(self, neighbourhood: int, week: int) -> np.ndarray:
        """Sellers and shops of one neighbourhood that have joined by ``week``."""
        return np.flatnonzero(
            (self.popularity > 0) & (self.neighbourhood == neighbourhood) & (self.joined <= week)
        )


def _shares(count: int, shares, rng: np.random.Generator) -> np.ndarray:
    """Neighbourhood labels for ``count`` members in the given proportions, shuffled."""
    exact = np.asarray(shares) * count
    sizes = np.floor(exact).astype(int)
    sizes[np.argsort(exact - sizes)[::-1][: count - sizes.sum()]] += 1
    return rng.permutation(np.repeat(np.arange(len(shares)), sizes)).astype(np.int8)


def _archetype_counts(members: int) -> dict[int, int]:
    shops = max(6, round(0.03 * members))
    couriers = max(9, round(0.02 * members))
    sellers = round(0.15 * members)
    friends = round(0.10 * members)
    return {
        SHOP: shops,
        COURIER: couriers,
        SELLER: sellers,
        FRIEND: friends,
        BUYER: members - shops - couriers - sellers - friends,
    }


def _draw_sellers(
    rng: np.random.Generator, pop_nbh, popularity, seller_mask, wanted_nbh, owners
) -> np.ndarray:
    """One seller per entry of ``wanted_nbh`` (weighted by popularity), never the owner."""
    out = np.empty(len(wanted_nbh), dtype=np.int64)
    for h in range(len(NEIGHBOURHOOD_NAMES)):
        pool = np.flatnonzero(seller_mask & (pop_nbh == h))
        pick = np.flatnonzero(wanted_nbh == h)
        weights = popularity[pool] / popularity[pool].sum()
        out[pick] = rng.choice(pool, size=len(pick), p=weights)
        clash = pick[out[pick] == owners[pick]]
        while len(clash):
            out[clash] = rng.choice(pool, size=len(clash), p=weights)
            clash = clash[out[clash] == owners[clash]]
    return out


def draw_population(
    rng: np.random.Generator, members: int, weeks: int, newcomer_rate: float
) -> Population:
    """Draw the initial members and the newcomers who join in later weeks."""
    counts = _archetype_counts(members)
    if counts[BUYER] < members // 3:
        raise ValueError(f"members={members} is too small; use at least 200")
    arche_initial = np.concatenate(
        [np.full(counts[a], a, dtype=np.int8) for a in (BUYER, SELLER, SHOP, COURIER, FRIEND)]
    )
    nbh_initial = np.concatenate(
        [
            _shares(counts[a], NEIGHBOURHOOD_SHARES, rng)
            for a in (BUYER, SELLER, SHOP, COURIER, FRIEND)
        ]
    )
    order = rng.permutation(members)  # ids carry no hint of the archetype
    archetype = np.empty(members, dtype=np.int8)
    neighbourhood = np.empty(members, dtype=np.int8)
    archetype[order] = arche_initial
    neighbourhood[order] = nbh_initial
    joined = np.zeros(members, dtype=np.int64)

    per_week = rng.poisson(newcomer_rate * members, size=weeks)
    per_week[0] = 0
    n_new = int(per_week.sum())
    archetype = np.concatenate(
        [archetype, np.where(rng.random(n_new) < 0.15, SELLER, BUYER).astype(np.int8)]
    )
    neighbourhood = np.concatenate(
        [neighbourhood, rng.choice(3, size=n_new, p=NEIGHBOURHOOD_SHARES).astype(np.int8)]
    )
    joined = np.concatenate([joined, np.repeat(np.arange(weeks), per_week)])
    n = members + n_new
    idx = np.arange(n)

    rate = np.zeros(n)
    rate[archetype == BUYER] = rng.lognormal(np.log(1.4), 0.8, (archetype == BUYER).sum())
    rate[archetype == FRIEND] = rng.lognormal(np.log(1.2), 0.7, (archetype == FRIEND).sum())
    rate[archetype == SELLER] = rng.lognormal(np.log(0.5), 0.6, (archetype == SELLER).sum())

    popularity = np.zeros(n)
    popularity[archetype == SELLER] = rng.lognormal(0.0, 0.5, (archetype == SELLER).sum())
    popularity[archetype == SHOP] = rng.lognormal(np.log(5.0), 0.5, (archetype == SHOP).sum())
    repairer = (archetype == SELLER) & (rng.random(n) < 0.3)

    buys = rate > 0
    initial_seller = (popularity > 0) & (joined == 0)
    # Favourites: mostly own neighbourhood, one in ten from an adjacent one.
    wanted = np.repeat(neighbourhood[:, None], MAX_FAVOURITES, axis=1).astype(np.int64)
    abroad = rng.random(wanted.shape) < 0.1
    side = rng.integers(0, 2, wanted.shape)
    adjacent_of = np.array([[1, 1], [0, 2], [1, 1]])
    wanted = np.where(abroad, adjacent_of[wanted, side], wanted)
    favourites = _draw_sellers(
        rng,
        neighbourhood,
        popularity,
        initial_seller,
        wanted.ravel(),
        np.repeat(idx, MAX_FAVOURITES),
    ).reshape(n, MAX_FAVOURITES)
    n_favourites = np.clip(1 + rng.poisson(2.5, n), 1, MAX_FAVOURITES)
    n_favourites[~buys] = 0

    courier = np.full(n, -1, dtype=np.int64)
    for h in range(3):
        pool = np.flatnonzero((archetype == COURIER) & (neighbourhood == h))
        who = np.flatnonzero(buys & (neighbourhood == h))
        courier[who] = rng.choice(pool, size=len(who))
    p_deliver = np.where(buys, rng.beta(2.0, 5.0, n), 0.0)
    p_explore = np.where(buys, 0.1, 0.0)

    suppliers = np.zeros((n, MAX_SUPPLIERS), dtype=np.int64)
    n_suppliers = np.zeros(n, dtype=np.int64)
    shops = np.flatnonzero(archetype == SHOP)
    for h in range(3):
        pool = np.flatnonzero((archetype == SELLER) & (neighbourhood == h) & (joined == 0))
        mine = shops[neighbourhood[shops] == h]
        suppliers[mine] = rng.choice(pool, size=(len(mine), MAX_SUPPLIERS))
    n_suppliers[shops] = rng.integers(2, MAX_SUPPLIERS + 1, len(shops))

    pairs: list[np.ndarray] = []
    for h in range(3):
        group = rng.permutation(np.flatnonzero((archetype == FRIEND) & (neighbourhood == h)))
        sizes: list[int] = []
        while sum(sizes) + 4 <= len(group):
            sizes.append(int(rng.integers(4, 7)))
        if sizes:
            sizes[-1] += len(group) - sum(sizes)
        for circle in np.split(group, np.cumsum(sizes)[:-1]):
            a, b = np.meshgrid(circle, circle, indexing="ij")
            keep = a != b
            pairs.append(np.stack([a[keep], b[keep]], axis=1))
    friend_pairs = np.concatenate(pairs) if pairs else np.zeros((0, 2), np.int64)

    return Population(
        archetype=archetype,
        neighbourhood=neighbourhood,
        joined=joined,
        rate=rate,
        favourites=favourites,
        n_favourites=n_favourites,
        courier=courier,
        p_deliver=p_deliver,
        p_explore=p_explore,
        popularity=popularity,
        repairer=repairer,
        suppliers=suppliers,
        n_suppliers=n_suppliers,
        friend_pairs=friend_pairs,
    )
