"""The frozen model (feature recipe, role basis, role names) and its life in the store."""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np
import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.features import FeatureRecipe
from rolewatch.engine.sensemaking import describe_roles, node_measures
from rolewatch.engine.snapshot import Snapshot
from rolewatch.store.schema import bases, recipes, roles


@dataclass(frozen=True)
class RoleInfo:
    role_id: int
    name: str
    description: str
    profile: dict = field(default_factory=dict)


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
    settings, snapshots: list[Snapshot], previous: FrozenModel | None = None
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


def _describe(basis: RoleBasis, snapshots: list[Snapshot], tables) -> list:
    measure_names = None
    measure_blocks, mixture_blocks = [], []
    for snapshot, table in zip(snapshots, tables):
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


def _stack_memberships(blocks):
    from rolewatch.engine.basis import Memberships

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
    exists = connection.execute(
        sa.select(recipes.c.version).where(recipes.c.version == model.recipe.version)
    ).first()
    if exists is None:
        connection.execute(
            recipes.insert().values(
                version=model.recipe.version,
                created_us=now_us,
                body=json.dumps(model.recipe.to_dict()),
            )
        )
    connection.execute(bases.update().values(active=False))
    already = connection.execute(
        sa.select(bases.c.version).where(bases.c.version == model.basis.version)
    ).first()
    if already is None:
        connection.execute(
            bases.insert().values(
                version=model.basis.version,
                recipe_version=model.recipe.version,
                created_us=now_us,
                active=True,
                trained_from_us=trained_from_us,
                trained_to_us=trained_to_us,
                body=json.dumps(model.basis.to_dict()),
            )
        )
        connection.execute(
            roles.insert(),
            [
                {
                    "basis_version": model.basis.version,
                    "role_id": info.role_id,
                    "name": info.name,
                    "description": info.description,
                    "profile": json.dumps(info.profile),
                }
                for info in model.roles
            ],
        )
    else:
        connection.execute(
            bases.update().where(bases.c.version == model.basis.version).values(active=True)
        )


def load_active_model(connection: Connection) -> FrozenModel | None:
    """The active recipe, basis and role names, or None before training has finished."""
    row = connection.execute(
        sa.select(bases.c.version, bases.c.body, bases.c.recipe_version).where(bases.c.active)
    ).first()
    if row is None:
        return None
    recipe_body = connection.execute(
        sa.select(recipes.c.body).where(recipes.c.version == row.recipe_version)
    ).scalar_one()
    role_rows = connection.execute(
        sa.select(roles).where(roles.c.basis_version == row.version).order_by(roles.c.role_id)
    ).all()
    return FrozenModel(
        recipe=FeatureRecipe.from_dict(json.loads(recipe_body)),
        basis=RoleBasis.from_dict(json.loads(row.body)),
        roles=tuple(
            RoleInfo(r.role_id, r.name, r.description, json.loads(r.profile)) for r in role_rows
        ),
    )
