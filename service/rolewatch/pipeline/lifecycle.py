"""The role basis's life after training: an operator refits it on a period they name.

Training itself happens in the window closer (the first ``training_windows`` windows). A
refit is an explicit admin action: the recipe and basis are fitted again on the closed
windows inside the named period, the new roles are matched to the current ones so that ids
of persisting roles stay the same (and keep the names operators gave them), and the new
basis becomes active for the windows that close from then on. Stored memberships keep the
basis version they were measured with.
"""

from __future__ import annotations

from typing import Any

from rolewatch.clock import now_micros, to_rfc3339
from rolewatch.config import Settings
from rolewatch.pipeline.loading import load_window_events
from rolewatch.pipeline.model import fit_model, load_active_model, store_model
from rolewatch.store.db import Engine, write_transaction
from rolewatch.store.windows import closed_windows_within


class RefitError(ValueError):
    """The named period cannot be used for a refit; the message says why."""


def refit_basis(
    engine: Engine, settings: Settings, start_us: int, end_us: int, *, now_us: int | None = None
) -> dict[str, Any]:
    """Fit a new recipe and basis on the closed windows within ``[start_us, end_us]``.

    Returns a summary: new basis version, recipe version, role ids kept and added, and the
    windows used. Raises :class:`RefitError` when the period holds no closed window with
    events or when training has not finished yet.
    """
    now_us = now_us if now_us is not None else now_micros()
    with engine.connect() as connection:
        previous = load_active_model(connection)
        if previous is None:
            raise RefitError(
                "no basis has been trained yet: wait until the first training windows close"
            )
        rows = closed_windows_within(connection, start_us, end_us)
        loaded = [load_window_events(connection, row.start_us, row.end_us) for row in rows]
    snapshots = [window_events.snapshot() for window_events in loaded if len(window_events)]
    if not snapshots:
        raise RefitError(
            f"no closed window with events lies within {to_rfc3339(start_us)} – "
            f"{to_rfc3339(end_us)}: name a period that covers closed windows"
        )
    model = fit_model(settings, snapshots, previous=previous)
    with write_transaction(engine) as connection:
        store_model(
            connection,
            model,
            trained_from_us=rows[0].start_us,
            trained_to_us=rows[-1].end_us,
            now_us=now_us,
        )
    old_ids = set(previous.basis.role_ids)
    new_ids = [int(role_id) for role_id in model.basis.role_ids]
    return {
        "basis_version": model.basis.version,
        "recipe_version": model.recipe.version,
        "previous_basis_version": previous.basis.version,
        "windows": len(rows),
        "roles_kept": [role_id for role_id in new_ids if role_id in old_ids],
        "roles_added": [role_id for role_id in new_ids if role_id not in old_ids],
        "roles": [{"id": info.role_id, "name": info.name} for info in model.roles],
    }
