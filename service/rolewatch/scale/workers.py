"""The workers in the cluster now, asked of the scheduler each time."""

from __future__ import annotations

from typing import Any


def live_workers(client: Any) -> set[str]:
    """Addresses of the workers the scheduler knows now.

    Not ``Client.scheduler_info()["workers"]``: that returns the client's cached identity,
    which the client's periodic refresh (every ``distributed.client.scheduler-info-interval``)
    replaces with one listing no workers. A refresh landing between the fresh fetch and the
    return made live workers look gone: their feature values unreadable, their scratch files
    never deleted. ``Client.nthreads`` asks the scheduler and returns its answer.
    """
    return set(client.nthreads())
