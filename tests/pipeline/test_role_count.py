"""The number of roles fitted on each scenario's training windows is reproducible.

Resampling 90 % of the training accounts, or taking out the 2 % of events that are exact
copies of others, must not change k (the role-count acceptance rule; no outside source),
and k stays below the top of the allowed range on these scenarios.  CI-sized draws.
"""

from types import SimpleNamespace

import numpy as np
import pytest

from rolewatch.config import load_settings
from rolewatch.engine.features import FeatureRecipe
from rolewatch.engine.snapshot import Snapshot
from rolewatch.pipeline.model import fit_basis
from rolewatch.pipeline.offline import split_windows
from rolewatch.pipeline.windows import WindowGeometry
from rolewatch.scenario import SCENARIOS, generate_scenario

SETTINGS = load_settings(window_period="7d", window_span="7d", training_windows=4)


def training_snapshots(events) -> list[Snapshot]:
    time_us = events.time.astype("datetime64[us]").astype(np.int64)
    spans = split_windows(time_us, WindowGeometry.from_settings(SETTINGS))
    return [
        Snapshot.from_events(events.actor[rows], events.target[rows], events.weight[rows])
        for _start, _end, rows in spans[: SETTINGS.training_windows]
    ]


def fitted_roles(snapshots, keep_accounts=None) -> int:
    s = SETTINGS
    recipe = FeatureRecipe.discover(
        snapshots,
        max_rounds=s.feature_rounds,
        bin_fraction=s.bin_fraction,
        tolerance=s.prune_tolerance,
        tolerance_step=s.prune_tolerance_step,
        binning=s.binning,
    )
    tables = [recipe.transform(snapshot) for snapshot in snapshots]
    if keep_accounts is not None:
        tables = [subset(table, np.isin(table.nodes, keep_accounts)) for table in tables]
    assert s.roles is None  # the number of roles is selected, as in training
    basis = fit_basis(s, tables)
    return basis.n_roles


def subset(table, keep):
    """The rows ``keep`` of a feature table, with what the basis reads from it."""
    return SimpleNamespace(
        binned=table.binned[keep],
        nodes=table.nodes[keep],
        names=table.names,
        recipe_version=table.recipe_version,
    )


def with_copies(events, share, seed):
    """The events plus exact copies (new ids) of ``share`` of them."""
    rng = np.random.default_rng(seed)
    copies = rng.choice(len(events.id), size=int(share * len(events.id)), replace=False)
    every = np.concatenate([np.arange(len(events.id)), copies])
    return SimpleNamespace(
        time=events.time[every],
        actor=events.actor[every],
        target=events.target[every],
        weight=events.weight[every],
    )


@pytest.mark.slow
@pytest.mark.parametrize(
    "name",
    sorted(SCENARIOS),
)
def test_number_of_roles_survives_resampling_and_duplicates(name):
    events = generate_scenario(name, seed=7, members=400, weeks=7, training_weeks=4).events
    snapshots = training_snapshots(events)
    k = fitted_roles(snapshots)
    assert k < SETTINGS.roles_max
    accounts = np.unique(np.concatenate([snapshot.nodes for snapshot in snapshots]))
    kept = np.random.default_rng(1).choice(accounts, int(0.9 * accounts.size), replace=False)
    assert fitted_roles(snapshots, keep_accounts=kept) == k
    # 2 % of the events copied: removing them must give the same k
    assert fitted_roles(training_snapshots(with_copies(events, 0.02, seed=2))) == k
