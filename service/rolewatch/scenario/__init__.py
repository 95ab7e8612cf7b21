"""Fictional scenarios for ``rolewatch demo``, fixtures, tests and the detection benchmark.

The neighbourhood marketplace (``generate``) is the demo scenario: about 3,000 members pay
each other for second-hand goods, repairs and deliveries over weekly windows; a few
accounts change role on purpose (the ground truth) and some change only in volume or are
simply new (negative controls). Three structurally different scenarios sit beside it for
the benchmark: a hobby forum (``forum``), a regional payments network (``payments``) and an
online game's item trading with guilds (``guilds``). All names and data are invented.

>>> from rolewatch.scenario import generate, generate_scenario, write
>>> scenario = generate(seed=0)                          # doctest: +SKIP
>>> forum = generate_scenario("forum", seed=1)           # doctest: +SKIP
>>> write(forum, "out/")                                 # doctest: +SKIP
"""

from collections.abc import Callable

from . import forum, guilds, payments
from .marketplace import DEFAULT_START, KINDS, EventColumns, Scenario, generate
from .output import write
from .plants import CHANGES as SCENARIO_CHANGES
from .truth import CHANGES, PLANTED

SCENARIOS: dict[str, Callable[..., Scenario]] = {
    "marketplace": generate,
    forum.NAME: forum.generate,
    payments.NAME: payments.generate,
    guilds.NAME: guilds.generate,
}

# The truth-row change types each scenario plants (its ``meta["changes"]``; the marketplace
# predates that field). The marketplace's festive week is in ``meta["season_window"]``.
PLANTED_CHANGES: dict[str, tuple[str, ...]] = {
    "marketplace": CHANGES,
    forum.NAME: SCENARIO_CHANGES,
    payments.NAME: SCENARIO_CHANGES,
    guilds.NAME: SCENARIO_CHANGES,
}


def generate_scenario(name: str, **kwargs) -> Scenario:
    """Generate the scenario registered as ``name`` (see ``SCENARIOS``) with its keyword
    arguments, e.g. ``generate_scenario("payments", seed=2, members=400, weeks=10)``."""
    try:
        make = SCENARIOS[name]
    except KeyError:
        known = ", ".join(sorted(SCENARIOS))
        raise ValueError(f"unknown scenario {name!r}; choose one of: {known}") from None
    return make(**kwargs)


__all__ = [
    "CHANGES",
    "DEFAULT_START",
    "KINDS",
    "PLANTED",
    "PLANTED_CHANGES",
    "SCENARIOS",
    "EventColumns",
    "Scenario",
    "generate",
    "generate_scenario",
    "write",
]
