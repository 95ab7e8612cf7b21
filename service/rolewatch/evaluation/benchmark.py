"""The detection benchmark: every scenario, leave-one-scenario-out defaults, baselines, real data.

:func:`evaluate` runs the pipeline on each scenario draw (cached,
:mod:`rolewatch.evaluation.runs`), scores the tunable grid on the kept inputs
(:mod:`rolewatch.evaluation.tuning`), and for every scenario reports the figures of the
choice tuned on the *other* scenarios beside the three baselines at the same budget
(:mod:`rolewatch.evaluation.compare`). :func:`evaluate_real` runs the real message
network with label-free checks (:mod:`rolewatch.evaluation.realcheck`).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from rolewatch.config import Settings
from rolewatch.pipeline.compute import policy_from_settings

from .compare import BASELINES, baseline_alerts, baseline_scores
from .figures import figures, summarise
from .realcheck import small_count_share, visible_bursts
from .runs import Run, cached_events_run, capture_events, capture_scenario
from .tuning import Choice, choose, grid, score_grid

__all__ = ["evaluate", "evaluate_real"]

Progress = Callable[[str], None]


def _runs(
    settings: Settings,
    scenarios: Sequence[str],
    seeds: Sequence[int],
    members: int,
    weeks: int,
    cache: Path | None,
    progress: Progress,
) -> list[Run]:
    runs = []
    for name in scenarios:
        for seed in seeds:
            progress(f"{name} seed {seed}: running the pipeline ({members} members, {weeks} weeks)")
            runs.append(
                capture_scenario(
                    settings, name, seed=seed, members=members, weeks=weeks, cache=cache
                )
            )
    return runs


def _baseline_rows(
    run: Run, budget: float, ours: list[set[str]], training: list[bool]
) -> dict[str, dict[str, list[dict[str, float]]]]:
    """Figures of every baseline on one run: whole budget and matched alert counts."""
    from rolewatch.evaluation.activity import WEEK_US
    from rolewatch.scenario import generate_scenario

    scenario = generate_scenario(
        run.name,
        seed=run.seed,
        members=run.members,
        weeks=int(run.meta["weeks"]),
        training_weeks=int(run.meta["training_weeks"]),
    )
    events = scenario.events
    time_us = events.time.astype("datetime64[us]").astype(np.int64)
    scores = baseline_scores(time_us, events.actor, events.target, events.weight, period_us=WEEK_US)
    ends = [window.end_us for window in run.windows]
    quotas = [len(alerted) for alerted in ours]
    out: dict[str, dict[str, list[dict[str, float]]]] = {}
    for name in BASELINES:
        for mode, quota in (("budget", None), ("matched", quotas)):
            alerts = baseline_alerts(scores[name], ends, training, budget=budget, quotas=quota)
            row = figures(run.truth, run.meta, alerts, run.active(), training)
            out.setdefault(name, {}).setdefault(mode, []).append(row)
    return out


def evaluate(
    settings: Settings,
    *,
    scenarios: Sequence[str],
    seeds: Sequence[int],
    members: int,
    weeks: int,
    cache: Path | None = None,
    progress: Progress = lambda message: None,
) -> dict[str, Any]:
    """Run the benchmark on ``scenarios`` x ``seeds``; return the full report (JSON-ready)."""
    runs = _runs(settings, scenarios, seeds, members, weeks, cache, progress)
    base = policy_from_settings(settings)
    choices = grid()
    defaults = Choice(base.novelty_windows, base.tie_smoothing, base.floor)
    if defaults not in choices:
        choices.append(defaults)
    progress(f"scoring {len(choices)} parameter combinations on {len(runs)} runs")
    results = score_grid(runs, base, choices)
    names = list(dict.fromkeys(run.name for run in runs))
    everything = [True] * len(runs)
    report: dict[str, Any] = {
        "scenarios": names,
        "seeds": list(seeds),
        "members": members,
        "weeks": weeks,
        "alert_budget": settings.alert_budget,
        "defaults": defaults.label(),
        "tuned_on_all": choose(results, everything, settings.alert_budget).label(),
        "held_out": {},
    }
    for name in names:
        held = [run.name == name for run in runs]
        picked = (
            choose(results, [not h for h in held], settings.alert_budget)
            if len(names) > 1
            else defaults
        )
        rows = [row for row, h in zip(results[picked], held, strict=True) if h]
        default_rows = [row for row, h in zip(results[defaults], held, strict=True) if h]
        baselines: dict[str, dict[str, list[dict[str, float]]]] = {}
        for run, h in zip(runs, held, strict=True):
            if not h:
                continue
            progress(f"{name} seed {run.seed}: baselines")
            training = [window.training for window in run.windows]
            ours = run.alerts_under(picked.policy(base))
            for key, modes in _baseline_rows(run, settings.alert_budget, ours, training).items():
                for mode, more in modes.items():
                    baselines.setdefault(key, {}).setdefault(mode, []).extend(more)
        report["held_out"][name] = {
            "choice": picked.label(),
            "role_shift": {"per_seed": rows, "summary": summarise(rows)},
            "defaults": {"per_seed": default_rows, "summary": summarise(default_rows)},
            "baselines": {
                key: {mode: summarise(value) for mode, value in modes.items()}
                for key, modes in baselines.items()
            },
        }
    return report


def evaluate_real(
    settings: Settings, *, cache: Path | None = None, progress: Progress = lambda m: None
) -> dict[str, Any]:
    """The real message network through the pipeline, with the label-free checks, beside
    the baselines at the same budget."""
    from .activity import WEEK_US
    from .realdata import college_messages

    data = college_messages()
    run = cached_events_run(
        settings,
        "collegemsg",
        {"package": data.source.get("package"), "version": data.source.get("version")},
        cache,
        lambda: capture_events(
            settings,
            event_id=data.id,
            time_us=data.time_us,
            actor=data.actor,
            target=data.target,
            weight=data.weight,
            name="collegemsg",
        ),
        progress,
    )
    policy = policy_from_settings(settings)
    training = [window.training for window in run.windows]
    first_end = next((w.end_us for w in run.windows if not w.training), None)
    bursts = (
        visible_bursts(
            data.time_us, data.actor, data.target, period_us=WEEK_US, first_end_us=first_end
        )
        if first_end is not None
        else []
    )
    ours = run.alerts_under(policy)
    detectors: dict[str, list[set[str]]] = {"role_shift": ours}
    scores = baseline_scores(data.time_us, data.actor, data.target, data.weight, period_us=WEEK_US)
    ends = [window.end_us for window in run.windows]
    for name in BASELINES:
        detectors[name] = baseline_alerts(
            scores[name],
            ends,
            training,
            budget=settings.alert_budget,
            quotas=[len(a) for a in ours],
        )
    index_of = {window.end_us: i for i, window in enumerate(run.windows)}
    checks = {}
    for name, alerts in detectors.items():
        small, total = small_count_share(
            alerts, [w.nodes for w in run.windows], [w.events for w in run.windows]
        )
        caught = [
            any(
                burst.account in alerts[i]
                for i in (index_of[burst.window_end_us], index_of[burst.window_end_us] + 1)
                if i < len(alerts)
            )
            for burst in bursts
        ]
        checks[name] = {
            "alerts": total,
            "small_count_alerts": small,
            "small_count_share": small / total if total else None,
            "bursts_alerted": int(sum(caught)),
        }
    return {
        "source": data.source,
        "windows": len(run.windows),
        "training_windows": int(sum(training)),
        "bursts": [vars(burst) for burst in bursts],
        "checks": checks,
        "alerts": [
            {"window_end_us": w.end_us, "accounts": sorted(a)}
            for w, a in zip(run.windows, ours, strict=True)
            if a
        ],
    }
