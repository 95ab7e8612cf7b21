"""The frozen model (feature recipe, role basis, role names): fitted here, kept in the store
(:mod:`rolewatch.store.models`)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from rolewatch.config import Settings
from rolewatch.engine.activity import activity_counts
from rolewatch.engine.basis import RoleBasis
from rolewatch.engine.features import FeatureRecipe, FeatureTable
from rolewatch.engine.features.discovery import GraphColumns, ReferenceColumns
from rolewatch.engine.features.graph import SnapshotGraph
from rolewatch.engine.naming import RoleProfile, describe_roles
from rolewatch.engine.readable import readable_measures
from rolewatch.engine.rowkeys import account_sample
from rolewatch.engine.snapshot import Snapshot
from rolewatch.store.db import Connection
from rolewatch.store.models import RoleInfo, StoredModel, active_model, save_model

__all__ = [
    "FrozenModel",
    "InProcessFeatures",
    "RoleInfo",
    "TrainingFeatures",
    "fit_basis",
    "fit_model",
    "load_active_model",
    "store_model",
]


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


class TrainingFeatures(Protocol):
    """Where the training windows' features are computed: on each window's whole graph,
    read at its sampled rows."""

    def references(self, rows: Sequence[np.ndarray | None]) -> Sequence[ReferenceColumns]:
        """Each window, read at ``rows[k]`` (its sampled positions; None: every row)."""
        ...


@dataclass(frozen=True)
class InProcessFeatures:
    """The training windows' features computed in this process, from their snapshots."""

    snapshots: Sequence[Snapshot]

    def references(self, rows: Sequence[np.ndarray | None]) -> list[ReferenceColumns]:
        return [
            GraphColumns(SnapshotGraph(snapshot), picked)
            for snapshot, picked in zip(self.snapshots, rows, strict=True)
        ]


def fit_model(
    settings: Settings,
    snapshots: list[Snapshot],
    previous: FrozenModel | None = None,
    *,
    features: TrainingFeatures | None = None,
) -> FrozenModel:
    """Discover the recipe, fit the basis and describe its roles on reference snapshots.

    Windows with more than ``training_sample_accounts`` accounts are fitted on a seeded
    sample of them (:func:`rolewatch.engine.rowkeys.account_sample`): their features come
    from the whole graph, but the bins, the pruning, the basis and the role descriptions
    see the sample only, so training's memory stops growing with the window past one full
    feature table. With a ``previous`` model, the new roles are matched to the old ones so
    ids persist, and names an operator gave to persisting roles are kept. ``features``
    says where the features are computed (None: in this process, from ``snapshots``; a
    Dask close passes :class:`rolewatch.scale.training.ClusterTraining`); the readable
    measures that describe the roles are read off ``snapshots`` at the sampled rows.
    """
    if not snapshots:
        raise ValueError("discover needs at least one reference snapshot")
    sample = account_sample(
        [snapshot.nodes for snapshot in snapshots],
        settings.training_sample_accounts,
        settings.seed,
    )
    rows_of: list[np.ndarray | None] = [None] * len(snapshots) if sample is None else [*sample]
    features = features if features is not None else InProcessFeatures(snapshots)
    recipe, binned = FeatureRecipe.discover_on(
        features.references(rows_of),
        accounts=int(sum(snapshot.n_nodes for snapshot in snapshots)),
        sampled=sample is not None,
        max_rounds=settings.feature_rounds,
        bin_fraction=settings.bin_fraction,
        tolerance=settings.prune_tolerance,
        tolerance_step=settings.prune_tolerance_step,
        binning=settings.binning,
    )
    tables = _training_tables(settings, recipe, binned, snapshots, rows_of)
    basis = fit_basis(settings, tables)
    if previous is not None:
        basis = basis.aligned_to(previous.basis)
    descriptions = _describe(basis, snapshots, tables, rows_of)
    kept_names = {info.role_id: info.name for info in previous.roles} if previous else {}
    infos = []
    for description, weights in zip(descriptions, basis.F, strict=True):
        infos.append(
            RoleInfo(
                role_id=int(description.role_id),
                name=kept_names.get(int(description.role_id), description.name),
                description=description.description,
                profile=_profile(description, basis.feature_names, weights),
            )
        )
    return FrozenModel(recipe=recipe, basis=basis, roles=tuple(infos))


def fit_basis(settings: Settings, tables: Sequence[FeatureTable]) -> RoleBasis:
    """The role basis (RolX) fitted on training ``tables`` with the settings' number of
    roles (or its selection range), seed, resampling and tolerance."""
    return RoleBasis.fit(
        tables,
        n_roles=settings.roles,
        k_range=(settings.roles_min, settings.roles_max),
        seed=settings.seed,
        sample_rows=settings.roles_sample_rows,
        stability_min=settings.roles_stability_min,
        tolerance=settings.roles_mdl_tolerance,
        resamples=settings.roles_resamples,
    )


def _training_tables(
    settings: Settings,
    recipe: FeatureRecipe,
    binned: np.ndarray,
    snapshots: list[Snapshot],
    rows_of: list[np.ndarray | None],
) -> list[FeatureTable]:
    """Each training window's table at its sampled rows, for the basis fit and the role
    descriptions, which read only the bins: with frozen binning, discovery's own bins of the
    sampled rows (the recipe is not computed again); with relative binning, each window
    binned on all its values in this process (:meth:`FeatureRecipe.transform`)."""
    if settings.binning != "frozen":
        return [
            recipe.transform(snapshot) if rows is None else recipe.transform(snapshot).take(rows)
            for snapshot, rows in zip(snapshots, rows_of, strict=True)
        ]
    tables, start = [], 0
    for snapshot, rows in zip(snapshots, rows_of, strict=True):
        nodes = snapshot.nodes if rows is None else snapshot.nodes[rows]
        stop = start + len(nodes)
        tables.append(
            FeatureTable(
                nodes=nodes,
                names=recipe.names,
                raw=np.empty((len(nodes), 0)),  # the raw values are not read in training
                binned=binned[start:stop],
                recipe_version=recipe.version,
            )
        )
        start = stop
    return tables


def _describe(
    basis: RoleBasis,
    snapshots: list[Snapshot],
    tables: list[FeatureTable],
    rows_of: list[np.ndarray | None],
) -> list[RoleProfile]:
    """Readable measures and mixtures of every account (or of the sampled ones) of the
    reference windows, stacked; the share of new counterparts counts from the second
    window on (NaN in the first)."""
    measure_blocks, mixture_blocks = [], []
    previous: Snapshot | None = None
    for snapshot, table, rows in zip(snapshots, tables, rows_of, strict=True):
        if snapshot.n_nodes == 0:
            continue
        new = activity_counts(snapshot, previous).new_counterparts if previous else None
        measures = readable_measures(snapshot.counts, rows=rows, new_counterparts=new)
        measure_blocks.append(measures.values)
        mixture_blocks.append(basis.memberships(table).mixture)
        previous = snapshot
    if not measure_blocks:
        raise ValueError("the training windows hold no events: post events before training")
    return describe_roles(basis.role_ids, np.vstack(mixture_blocks), np.vstack(measure_blocks))


def _profile(
    description: RoleProfile, feature_names: tuple[str, ...], features: np.ndarray
) -> dict[str, Any]:
    """What the catalogue shows of a role: readable measures against the population, then
    the basis' feature weights."""
    return {
        "holders": description.holders,
        "measures": {
            name: {
                "mean": description.mean[name],
                "population": description.population[name],
                "level": description.level[name],
            }
            for name in description.mean
        },
        "features": {f: float(v) for f, v in zip(feature_names, features, strict=True)},
    }


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
