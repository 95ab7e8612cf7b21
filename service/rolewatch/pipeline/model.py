"""The frozen model (feature recipe, role basis, role names): fitted here, kept in the store
(:mod:`rolewatch.store.models`)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from rolewatch.config import Settings
from rolewatch.engine.basis import Memberships, RoleBasis
from rolewatch.engine.features import FeatureRecipe, FeatureTable
from rolewatch.engine.sensemaking import RoleDescription, describe_roles, node_measures
from rolewatch.engine.snapshot import Snapshot
from rolewatch.store.db import Connection
from rolewatch.store.models import RoleInfo, StoredModel, active_model, save_model

__all__ = ["FrozenModel", "RoleInfo", "fit_model", "load_active_model", "store_model"]


@dataclass(frozen=True)
class FrozenModel:
    """What every window after training is measured against."""

    recipe: FeatureRecipe
    basis: RoleBasis
    roles: tuple[RoleInfo, ...]

    def role_name(self, role_id: int) -> str:
        for info in self.roles:
            if info.role_id == role_id:
                return info.name
        return f"role {role_id}"


def fit_model(
    settings: Settings, snapshots: list[Snapshot], previous: FrozenModel | None = None
) -> FrozenModel:
    """Discover the recipe, fit the basis and describe its roles on reference snapshots.

    With a ``previous`` model, the new roles are matched to the old ones so ids persist, and
    names an operator gave to persisting roles are kept.
    """
    recipe = FeatureRecipe.discover(
        snapshots,
        max_rounds=settings.feature_rounds,
        bin_fraction=settings.bin_fraction,
        tolerance=settings.prune_tolerance,
        tolerance_step=settings.prune_tolerance_step,
        binning=settings.binning,
    )
    tables = [recipe.transform(snapshot) for snapshot in snapshots]
    basis = RoleBasis.fit(
        tables,
        n_roles=settings.roles,
        k_range=(settings.roles_min, settings.roles_max),
        seed=settings.seed,
        sample_rows=settings.roles_sample_rows,
        stability_min=settings.roles_stability_min,
        tolerance=settings.roles_mdl_tolerance,
        resamples=settings.roles_resamples,
    )
    if previous is not None:
        basis = basis.aligned_to(previous.basis)
    descriptions = _describe(basis, snapshots, tables)
    kept_names = {info.role_id: info.name for info in previous.roles} if previous else {}
    infos = []
    for description in descriptions:
        infos.append(
            RoleInfo(
                role_id=int(description.role_id),
                name=kept_names.get(int(description.role_id), description.name),
                description=description.description,
                profile={
                    "features": description.profile,
                    "measures": description.measure_affinity,
                },
            )
        )
    return FrozenModel(recipe=recipe, basis=basis, roles=tuple(infos))


def _describe(
    basis: RoleBasis, snapshots: list[Snapshot], tables: list[FeatureTable]
) -> list[RoleDescription]:
    measure_names: tuple[str, ...] = ()
    measure_blocks, mixture_blocks = [], []
    for snapshot, table in zip(snapshots, tables, strict=True):
        if snapshot.n_nodes == 0:
            continue
        names, values = node_measures(snapshot, betweenness_samples=min(256, snapshot.n_nodes))
        measure_names = names
        measure_blocks.append(values)
        mixture_blocks.append(basis.memberships(table))
    if not measure_blocks:
        raise ValueError("the training windows hold no events: post events before training")
    stacked_measures = np.vstack(measure_blocks)
    stacked = _stack_memberships(mixture_blocks)
    return describe_roles(basis, stacked, measure_names, stacked_measures)


def _stack_memberships(blocks: list[Memberships]) -> Memberships:
    return Memberships(
        loadings=np.vstack([block.loadings for block in blocks]),
        mixture=np.vstack([block.mixture for block in blocks]),
        error=np.concatenate([block.error for block in blocks]),
    )


def store_model(
    connection: Connection,
    model: FrozenModel,
    *,
    trained_from_us: int,
    trained_to_us: int,
    now_us: int,
) -> None:
    """Save the model and make it the active one (the previous one stays for history)."""
    save_model(
        connection,
        StoredModel(
            recipe_version=model.recipe.version,
            recipe=model.recipe.to_dict(),
            basis_version=model.basis.version,
            basis=model.basis.to_dict(),
            roles=model.roles,
        ),
        trained_from_us=trained_from_us,
        trained_to_us=trained_to_us,
        now_us=now_us,
    )


def load_active_model(connection: Connection) -> FrozenModel | None:
    """The active recipe, basis and role names, or None before training has finished."""
    stored = active_model(connection)
    if stored is None:
        return None
    return FrozenModel(
        recipe=FeatureRecipe.from_dict(stored.recipe),
        basis=RoleBasis.from_dict(stored.basis),
        roles=stored.roles,
    )
