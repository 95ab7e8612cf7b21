"""``rolewatch evaluate``: detection quality on every scenario, beside three baselines.

For each scenario (``--scenario NAME`` or ``all``) and seed, the scenario is generated and
every window runs through the service's own pipeline (:func:`rolewatch.pipeline.offline.
run_offline`, the closer's ``compute_window``); what each window was scored from is kept
(and cached on disk), so the tunable scoring parameters are tried on every scenario
without recomputing. Defaults are chosen leave-one-scenario-out: each scenario's table
shows the figures of the parameters tuned on the *other* scenarios, beside the volume
z-score, the new-counterparts rule and MIDAS-R at the same budget
(:mod:`rolewatch.evaluation`). Then the real CollegeMsg network runs with label-free checks.

How each figure is counted: :mod:`rolewatch.evaluation.figures` (and docs/detection.md).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

QUICK_SEEDS, QUICK_MEMBERS, QUICK_WEEKS = "7", 400, 10  # the CI-sized draw


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rolewatch evaluate",
        description="Measure detection on the fictional scenarios through the service's own "
        "pipeline, choose the scoring defaults leave-one-scenario-out, compare with three "
        "baselines at the same alert budget, and check the alerts on a real network.",
    )
    parser.add_argument("--scenario", default="all", help="a scenario name or 'all' (default all)")
    parser.add_argument("--seeds", default=None, help="comma-separated seeds (default 0,1,2)")
    parser.add_argument("--members", type=int, default=None, help="members (default 3000)")
    parser.add_argument("--weeks", type=int, default=None, help="weekly windows (default 16)")
    parser.add_argument(
        "--quick",
        action="store_true",
        help="CI-sized draws (seed 7, 400 members, 10 weeks) and no real network",
    )
    parser.add_argument(
        "--real",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="run the real CollegeMsg network too (default: yes, except with --quick)",
    )
    parser.add_argument(
        "--cache",
        default=None,
        help="folder for cached pipeline runs (default $XDG_CACHE_HOME/rolewatch or "
        "~/.cache/rolewatch; 'none' turns caching off)",
    )
    parser.add_argument(
        "--budget-mode",
        choices=("matched", "budget"),
        default="matched",
        help="baselines alert as often as the role-shift score per window (matched, default) "
        "or use the whole budget",
    )
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="override a setting for this run, e.g. --set alert_floor=4.5 (repeatable)",
    )
    parser.add_argument("--json", action="store_true", help="print the full report as JSON")
    return parser


def _cache_dir(option: str | None) -> Path | None:
    if option is not None:
        return None if option.lower() == "none" else Path(option)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "rolewatch"


def _json_safe(value):
    """The report with NaN (a figure that does not apply) written as null: strict JSON."""
    if isinstance(value, dict):
        return {key: _json_safe(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(item) for item in value]
    if isinstance(value, float) and value != value:
        return None
    return value


def _arguments(args) -> tuple[list[str], str | None]:
    if args is None:
        return sys.argv[1:], None
    if isinstance(args, (list, tuple)):
        return list(args), None
    return list(getattr(args, "rest", []) or []), getattr(args, "config", None)


def main(args=None) -> int:
    """``rolewatch evaluate [--scenario NAME|all] [--seeds 0,1,2] [--quick] [--json] ...``.

    ``args`` is the CLI's namespace (its ``rest`` holds the arguments after the
    subcommand, its ``config`` the settings file) or a plain list of arguments.
    """
    from rolewatch.config import ConfigError, load_settings
    from rolewatch.evaluation.benchmark import evaluate, evaluate_real
    from rolewatch.evaluation.report import format_real, format_report
    from rolewatch.scenario import SCENARIOS

    argv, config = _arguments(args)
    options = _parser().parse_args(argv)
    names = list(SCENARIOS) if options.scenario == "all" else [options.scenario]
    if any(name not in SCENARIOS for name in names):
        print(
            f"unknown scenario {options.scenario!r}; choose one of: all, {', '.join(SCENARIOS)}",
            file=sys.stderr,
        )
        return 2
    seeds_text = options.seeds or (QUICK_SEEDS if options.quick else "0,1,2")
    try:
        seeds = [int(s) for s in seeds_text.split(",") if s.strip()]
    except ValueError:
        print(f"--seeds must be integers separated by commas, got {seeds_text!r}", file=sys.stderr)
        return 2
    members = options.members or (QUICK_MEMBERS if options.quick else 3000)
    weeks = options.weeks or (QUICK_WEEKS if options.quick else 16)
    overrides = {}
    for item in options.set:
        name, sep, value = item.partition("=")
        if not sep:
            print(f"--set needs NAME=VALUE, got {item!r}", file=sys.stderr)
            return 2
        overrides[name.strip()] = value.strip()
    try:
        settings = load_settings(config, **overrides)
    except ConfigError as error:
        print(error, file=sys.stderr)
        return 2

    def progress(message: str) -> None:
        print(message, file=sys.stderr, flush=True)

    cache = _cache_dir(options.cache)
    report = evaluate(
        settings,
        scenarios=names,
        seeds=seeds,
        members=members,
        weeks=weeks,
        cache=cache,
        progress=progress,
    )
    real = options.real if options.real is not None else not options.quick
    if real:
        report["real"] = evaluate_real(settings, cache=cache, progress=progress)
    if options.json:
        print(json.dumps(_json_safe(report), indent=2, default=str))
    else:
        print(format_report(report, mode=options.budget_mode))
        if real:
            print()
            print(format_real(report["real"]))
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main(sys.argv[1:]))
