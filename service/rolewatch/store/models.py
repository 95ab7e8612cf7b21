"""The stored model: feature recipes, role bases and their roles' names and descriptions.

One basis is active at a time: the windows that close are measured against it. Earlier
bases stay, so stored memberships keep the basis version they were measured with. Recipes
and bases are stored as the JSON documents their ``to_dict`` methods give; this module
never looks inside them.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa
from sqlalchemy.engine import Connection

from rolewatch.store.schema import bases, recipes, roles


@dataclass(frozen=True)
class RoleInfo:
    """A role of a basis: its id, the name operators see, and what characterises it."""

    role_id: int
    name: str
    description: str
    profile: dict = field(default_factory=dict)


@dataclass(frozen=True)
class StoredModel:
    """A recipe and basis as JSON documents, with the basis' roles."""

    recipe_version: str
    recipe: dict[str, Any]
    basis_version: str
    basis: dict[str, Any]
    roles: tuple[RoleInfo, ...]


def save_model(
    connection: Connection,
    model: StoredModel,
    *,
    trained_from_us: int,
    trained_to_us: int,
    now_us: int,
) -> None:
    """Save the model and make it the active one (the previous one stays for history).

    A basis stored before (same version) is only made active again; its roles keep the
    names they have.
    """
    exists = connection.execute(
        sa.select(recipes.c.version).where(recipes.c.version == model.recipe_version)
    ).first()
    if exists is None:
        connection.execute(
            recipes.insert().values(
                version=model.recipe_version, created_us=now_us, body=json.dumps(model.recipe)
            )
        )
    connection.execute(bases.update().values(active=False))
    already = connection.execute(
        sa.select(bases.c.version).where(bases.c.version == model.basis_version)
    ).first()
    if already is not None:
        connection.execute(
            bases.update().where(bases.c.version == model.basis_version).values(active=True)
        )
        return
    connection.execute(
        bases.insert().values(
            version=model.basis_version,
            recipe_version=model.recipe_version,
            created_us=now_us,
            active=True,
            trained_from_us=trained_from_us,
            trained_to_us=trained_to_us,
            body=json.dumps(model.basis),
        )
    )
    connection.execute(
        roles.insert(),
        [
            {
                "basis_version": model.basis_version,
                "role_id": info.role_id,
                "name": info.name,
                "description": info.description,
                "profile": json.dumps(info.profile),
            }
            for info in model.roles
        ],
    )


def active_model(connection: Connection) -> StoredModel | None:
    """The active recipe, basis and roles, or None before training has finished."""
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
    return StoredModel(
        recipe_version=row.recipe_version,
        recipe=json.loads(recipe_body),
        basis_version=row.version,
        basis=json.loads(row.body),
        roles=tuple(
            RoleInfo(r.role_id, r.name, r.description, json.loads(r.profile)) for r in role_rows
        ),
    )
