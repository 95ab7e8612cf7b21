"""The fictional neighbourhood marketplace used by ``rolewatch demo``, fixtures and tests.

About 3,000 members pay each other for second-hand goods, repairs and deliveries over
weekly windows; a few accounts change role on purpose (the ground truth) and some change
only in volume or are simply new (negative controls). All names and data are invented.

>>> from rolewatch.scenario import generate, write
>>> scenario = generate(seed=0)            # doctest: +SKIP
>>> write(scenario, "out/")                # doctest: +SKIP
"""

from .marketplace import DEFAULT_START, KINDS, EventColumns, Scenario, generate
from .output import write
from .truth import CHANGES, PLANTED

__all__ = [
    "CHANGES",
    "DEFAULT_START",
    "KINDS",
    "PLANTED",
    "EventColumns",
    "Scenario",
    "generate",
    "write",
]
