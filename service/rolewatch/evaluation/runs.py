"""One run of the service's pipeline over an event table, kept for re-scoring.

The detection benchmark runs every window through :func:`rolewatch.pipeline.offline.
run_offline` - the closer's own code path - once per scenario draw, and keeps per window
exactly what the scores were computed from (:class:`rolewatch.pipeline.compute.
ScoreInputs`). Scoring parameters that do not change the pipeline's measurements (the
floor, the components, the novelty history, the smoothing) are then tried by scoring the
kept inputs again, in seconds; choices that change the measurements (communities, the
roles) need a new run.

Runs are cached on disk (pickle files named by a hash of the scenario draw and of the
settings that change what the pipeline measures, :data:`PIPELINE_SETTINGS`), so a repeated
``rolewatch evaluate`` re-scores instead of recomputing.
"""

from __future__ import annotations

import hashlib
import json
import pickle
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from rolewatch.config import Settings
from rolewatch.engine.scoring import ShiftPolicy
from rolewatch.pipeline.compute import ScoreInputs

__all__ = [
    "CACHE_VERSION",
    "Run",
    "RunWindow",
    "cached_events_run",
    "capture_events",
    "capture_scenario",
]

CACHE_VERSION = 2  # bump when what a run keeps, or how it is computed, changes
# settings that change what the pipeline measures (not only how it is scored)
PIPELINE_SETTINGS = (
    "window_period",
    "window_span",
    "training_windows",
    "feature_rounds",
    "bin_fraction",
    "prune_tolerance",
    "prune_tolerance_step",
    "binning",
    "roles",
    "roles_min",
    "roles_max",
    "roles_sample_rows",
    "roles_stability_min",
    "roles_mdl_tolerance",
    "roles_resamples",
    "seed",
    "shift_measure",
    "shift_baseline",
    "baseline_windows",
    "baseline_half_life",
    "min_events",
    "novelty_windows",
    "bridge_resolution",
)


@dataclass
class RunWindow:
    """One measured window of a run."""

    index: int
    training: bool
    end_us: int
    nodes: np.ndarray  # str, the active accounts
    events: np.ndarray  # events (sent + received) per active account
    # accounts the pipeline alerted on with the settings of the run that made it (a cached
    # run may have been made under other scoring settings: score ``inputs`` again instead)
    alerts: list[str]
    inputs: ScoreInputs | None  # None for a window without events

    def alerts_under(self, policy: ShiftPolicy) -> set[str]:
        """The accounts this window alerts on when scored with ``policy``."""
        if self.training or self.inputs is None:
            return set()
        return set(self.nodes[self.inputs.score(policy).alert].tolist())


@dataclass
class Run:
    """A pipeline run over one event table: its windows, and the truth when planted."""

    name: str
    seed: int | None
    members: int | None
    truth: list[dict] = field(default_factory=list)
    meta: dict = field(default_factory=dict)
    windows: list[RunWindow] = field(default_factory=list)

    def alerts_under(self, policy: ShiftPolicy) -> list[set[str]]:
        return [window.alerts_under(policy) for window in self.windows]

    def active(self) -> list[int]:
        return [len(window.nodes) for window in self.windows]


def _cache_path(cache: Path | None, key: dict) -> Path | None:
    if cache is None:
        return None
    digest = hashlib.sha256(json.dumps(key, sort_keys=True, default=str).encode()).hexdigest()
    return cache / f"run-{key.get('name', 'events')}-{digest[:16]}.pkl"


def _settings_key(settings: Settings) -> dict:
    dumped = settings.model_dump(mode="json")
    return {name: dumped[name] for name in PIPELINE_SETTINGS}


def capture_events(
    settings: Settings,
    *,
    event_id,
    time_us,
    actor,
    target,
    weight,
    name: str = "events",
) -> Run:
    """Run the pipeline over an event table and keep every window's scoring inputs."""
    from threadpoolctl import threadpool_limits

    from rolewatch.pipeline.offline import run_offline

    run = Run(name=name, seed=None, members=None)
    # The engine's dense products are small: one BLAS thread beats two on a shared machine.
    with threadpool_limits(limits=1, user_api="blas"):
        for window in run_offline(
            settings, event_id=event_id, time_us=time_us, actor=actor, target=target, weight=weight
        ):
            result = window.result
            run.windows.append(
                RunWindow(
                    index=window.index,
                    training=window.training,
                    end_us=window.end_us,
                    nodes=np.asarray(result.nodes).astype(str),
                    events=np.asarray(result.activity.events, dtype=np.int64),
                    alerts=[alert.account for alert in result.alerts],
                    inputs=result.inputs,
                )
            )
    return run


def _load_or_make(path: Path | None, make: Callable[[], Run]) -> Run:
    """The run cached at ``path``, or a new one (then cached there)."""
    if path is not None and path.is_file():
        with path.open("rb") as handle:
            cached: Run = pickle.load(handle)
        return cached
    run = make()
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        with path.open("wb") as handle:
            pickle.dump(run, handle, protocol=pickle.HIGHEST_PROTOCOL)
    return run


def cached_events_run(
    settings: Settings,
    name: str,
    source: dict,
    cache: Path | None,
    make: Callable[[], Run],
    progress: Callable[[str], None] = lambda message: None,
) -> Run:
    """A run over a fixed event table (``source`` names it), cached like scenario runs."""
    key = {
        "version": CACHE_VERSION,
        "name": name,
        "source": source,
        "settings": _settings_key(settings),
    }
    path = _cache_path(cache, key)

    def announced() -> Run:
        progress(f"{name}: running the pipeline")
        return make()

    return _load_or_make(path, announced)


def capture_scenario(
    settings: Settings,
    name: str,
    *,
    seed: int,
    members: int,
    weeks: int,
    cache: Path | None = None,
) -> Run:
    """Generate scenario ``name`` and run the pipeline over it (cached by its parameters,
    the pipeline settings and :data:`CACHE_VERSION`)."""
    from rolewatch.scenario import generate_scenario

    key = {
        "version": CACHE_VERSION,
        "name": name,
        "seed": seed,
        "members": members,
        "weeks": weeks,
        "settings": _settings_key(settings),
    }

    def make() -> Run:
        scenario = generate_scenario(
            name, seed=seed, members=members, weeks=weeks, training_weeks=settings.training_windows
        )
        events = scenario.events
        run = capture_events(
            settings,
            event_id=events.id,
            time_us=events.time.astype("datetime64[us]").astype(np.int64),
            actor=events.actor,
            target=events.target,
            weight=events.weight,
            name=name,
        )
        run.seed, run.members, run.truth, run.meta = seed, members, scenario.truth, scenario.meta
        return run

    return _load_or_make(_cache_path(cache, key), make)
