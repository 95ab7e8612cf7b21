"""Role names are unique and descriptions distinct on every scenario and on real data.

The scenarios are invented; the real data is the CollegeMsg message network (Panzarasa,
Opsahl & Carley, JASIST 2009) loaded by rolewatch.evaluation.realdata. The rule for
descriptions is in tests/engine/phrases.py: no phrase of three or more words in more than
half of them.
"""

from __future__ import annotations

import numpy as np
import pytest

from rolewatch.config import Settings
from rolewatch.pipeline.loading import interned
from rolewatch.pipeline.model import fit_model
from rolewatch.pipeline.offline import split_windows
from rolewatch.pipeline.windows import WindowGeometry
from rolewatch.scenario import SCENARIOS, generate_scenario

from .phrases import most_shared_phrase, phrase_rule_holds

SMALL = {"members": 400, "weeks": 10}  # the small draw the scenario tests use

pytestmark = pytest.mark.slow


def _training_snapshots(settings: Settings, event_id, time_us, actor, target, weight):
    geometry = WindowGeometry.from_settings(settings)
    spans = split_windows(np.asarray(time_us, dtype=np.int64), geometry)
    snapshots = []
    for _start, _end, rows in spans[: settings.training_windows]:
        events = interned(
            np.asarray(event_id, dtype=object)[rows],
            np.asarray(actor, dtype=object)[rows],
            np.asarray(target, dtype=object)[rows],
            np.asarray(weight, dtype=np.float64)[rows],
        )
        snapshots.append(events.snapshot())
    return snapshots


def _check(model) -> None:
    names = [role.name for role in model.roles]
    descriptions = [role.description for role in model.roles]
    assert len(set(names)) == len(names), names
    assert not any(name.endswith(")") for name in names), names  # no "(2)" suffixes
    assert phrase_rule_holds(descriptions), (most_shared_phrase(descriptions), descriptions)
    assert all(any(ch.isdigit() for ch in text) for text in descriptions)


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_names_and_descriptions_on_each_scenario(name):
    settings = Settings()
    events = generate_scenario(name, seed=5, **SMALL).events
    time_us = events.time.astype("datetime64[us]").astype(np.int64)
    snapshots = _training_snapshots(
        settings, events.id, time_us, events.actor, events.target, events.weight
    )
    _check(fit_model(settings, snapshots))


def test_names_and_descriptions_on_collegemsg():
    from rolewatch.evaluation.realdata import college_messages

    real = college_messages()
    settings = Settings()
    snapshots = _training_snapshots(
        settings, real.id, real.time_us, real.actor, real.target, real.weight
    )
    _check(fit_model(settings, snapshots))
