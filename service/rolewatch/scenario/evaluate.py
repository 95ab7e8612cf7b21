"""Detection quality on the neighbourhood marketplace: role shift against a volume baseline.

``rolewatch evaluate`` generates the fictional scenario for several seeds, runs every
window through the very pipeline the service runs (:func:`rolewatch.pipeline.offline.
run_offline`, which calls the closer's ``compute_window``), and scores the alerts against
the planted ground truth. Beside it, a *volume baseline* alerts on the same number of
accounts per window, picked by a robust z-score of each account's weighted degree against
its own history, so the two detectors are compared at the same alert budget.

Scoring rules (also printed with the table and written in docs/detection.md):

* **recall** of a change type: share of its planted accounts alerted at the change's
  window or the one after (``window_index`` or ``window_index + 1``);
* **delay**: windows from the change to the first alert on the account (any later window),
  median over the detected ones;
* **precision**: alerts on a planted account (the changed account itself; for a funnel the
  collector) in or after its change window, over all alerts after training. Alerts on
  brand-new accounts (fresh ``new-…`` accounts, newcomers) and on the negative controls
  count as false positives: an analyst would have to review them all the same;
* **alert share**: alerts per window over the accounts active in that window (mean, max);
* **volume controls**: share of volume-control accounts alerted in any window from their
  change on; **season**: alert share of active accounts in the festive window.

Each figure is given as mean ± standard deviation and min–max over the seeds.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np

STRUCTURAL = ("takeover", "funnel", "reversal", "bridge")
MAD_SCALE = (
    1.4826  # consistency constant of the MAD for the normal (Rousseeuw & Croux 1993, as recalled)
)


# --- one seed's run ----------------------------------------------------------------------


@dataclass
class WindowRecord:
    """What one measured window leaves for scoring: its accounts and the alerts on them."""

    index: int
    training: bool
    nodes: np.ndarray  # str account ids of the active accounts
    alerts: set[str]  # accounts the pipeline alerted on
    strength: np.ndarray  # weighted degree (total weight in + out) per node


@dataclass
class SeedRun:
    seed: int
    truth: list[dict]
    meta: dict
    windows: list[WindowRecord] = field(default_factory=list)


def weighted_degree(nodes: np.ndarray, actor, target, weight) -> np.ndarray:
    """Total event weight in plus out of each node (its *strength*), in ``nodes`` order."""
    nodes = np.asarray(nodes).astype(str)
    order = np.argsort(nodes)
    out = np.zeros(len(nodes))
    w = np.asarray(weight, dtype=np.float64)
    for ends in (actor, target):
        pos = order[np.searchsorted(nodes[order], np.asarray(ends).astype(str))]
        out += np.bincount(pos, weights=w, minlength=len(nodes))
    return out


def run_seed(settings, *, seed: int, members: int, weeks: int, training_weeks: int | None = None):
    """Generate the scenario for ``seed`` and measure every window through the pipeline.

    Returns ``(SeedRun, windows)`` where ``windows`` are the raw
    :class:`~rolewatch.pipeline.offline.OfflineWindow` objects (for re-scoring).
    """
    from threadpoolctl import threadpool_limits

    from rolewatch.pipeline.offline import run_offline
    from rolewatch.scenario import generate

    scenario = generate(
        seed=seed,
        members=members,
        weeks=weeks,
        training_weeks=training_weeks or settings.training_windows,
    )
    ev = scenario.events
    time_us = ev.time.astype("datetime64[us]").astype(np.int64)
    run = SeedRun(seed=seed, truth=scenario.truth, meta=scenario.meta)
    raw = []
    # Small dense solves: one BLAS thread is much faster than two on a loaded machine.
    with threadpool_limits(1):
        for window in run_offline(
            settings,
            event_id=ev.id,
            time_us=time_us,
            actor=ev.actor,
            target=ev.target,
            weight=ev.weight,
        ):
            result = window.result
            run.windows.append(
                WindowRecord(
                    index=window.index,
                    training=window.training,
                    nodes=np.asarray(result.nodes).astype(str),
                    alerts={alert.account for alert in result.alerts},
                    strength=weighted_degree(
                        result.nodes,
                        window.events.actor,
                        window.events.target,
                        window.events.weight,
                    ),
                )
            )
            raw.append(window)
    return run, raw


# --- the volume baseline -----------------------------------------------------------------


def robust_zscore(
    history: np.ndarray, current: np.ndarray, *, min_history: int = 2, min_scale: float = 1.0
) -> np.ndarray:
    """Robust z-score of each account's current value against its own past values.

    ``z = (x - median(h)) / (1.4826 * MAD(h))`` over the account's previous active windows
    (NaN in ``history`` = inactive), the median absolute deviation scaled by 1.4826 so
    that it estimates the standard deviation of normal data (Rousseeuw & Croux, JASA 1993,
    as recalled; common practice). The scale is floored at ``min_scale`` so an account with
    identical past values does not get an infinite score for a small move.

    Parameters
    ----------
    history : ndarray, shape (t, n)
        Past values, oldest first; NaN where the account was inactive.
    current : ndarray, shape (n,)
    min_history : int
        Accounts with fewer past active windows get NaN (not scored).
    min_scale : float
        Smallest scale used.

    Returns
    -------
    ndarray, shape (n,)
    """
    H = np.asarray(history, dtype=np.float64)
    x = np.asarray(current, dtype=np.float64)
    if H.ndim != 2 or H.shape[1] != x.size:
        raise ValueError(f"history must be t x n with n={x.size}, got shape {H.shape}")
    count = np.isfinite(H).sum(axis=0)
    z = np.full(x.size, np.nan)
    ok = count >= min_history
    if not ok.any():
        return z
    h = H[:, ok]
    median = np.nanmedian(h, axis=0)
    mad = np.nanmedian(np.abs(h - median), axis=0)
    scale = np.maximum(MAD_SCALE * mad, min_scale)
    z[ok] = (x[ok] - median) / scale
    return z


def volume_alerts(run: SeedRun, budget: Sequence[int]) -> list[set[str]]:
    """Per window, the ``budget[i]`` accounts with the largest ``|z|`` of weighted degree.

    The history of an account is every earlier window it was active in (training windows
    included); training windows themselves never alert, as in the service.
    """
    accounts = (
        np.unique(np.concatenate([w.nodes for w in run.windows]))
        if run.windows
        else np.array([], str)
    )
    strength = np.full((len(run.windows), len(accounts)), np.nan)
    columns = []
    for t, window in enumerate(run.windows):
        cols = np.searchsorted(accounts, window.nodes)
        strength[t, cols] = window.strength
        columns.append(cols)
    out: list[set[str]] = []
    for t, (window, quota) in enumerate(zip(run.windows, budget, strict=False)):
        if window.training or quota <= 0 or t == 0:
            out.append(set())
            continue
        z = robust_zscore(strength[:t, columns[t]], window.strength)
        finite = np.flatnonzero(np.isfinite(z))
        top = finite[np.argsort(-np.abs(z[finite]), kind="stable")][:quota]
        out.append(set(window.nodes[top].tolist()))
    return out


# --- scoring against the ground truth ----------------------------------------------------


def score_alerts(run: SeedRun, alerts: Sequence[set[str]]) -> dict:
    """Recall, delay, precision, alert shares and control false alarms of one seed."""
    measured = [w for w in run.windows if not w.training]
    by_index = {w.index: a for w, a in zip(run.windows, alerts, strict=False)}
    active = {w.index: len(w.nodes) for w in run.windows}
    planted = {}
    for row in run.truth:
        if row["change"] in STRUCTURAL:
            planted[row["account"]] = row["window_index"]
    out: dict[str, float] = {}
    for change in STRUCTURAL:
        rows = [r for r in run.truth if r["change"] == change]
        hits, delays = 0, []
        for r in rows:
            w0 = r["window_index"]
            when = [i for i in sorted(by_index) if i >= w0 and r["account"] in by_index[i]]
            if when and when[0] <= w0 + 1:
                hits += 1
            if when:
                delays.append(when[0] - w0)
        out[f"recall_{change}"] = hits / len(rows) if rows else float("nan")
        out[f"delay_{change}"] = float(np.median(delays)) if delays else float("nan")
    rec = [out[f"recall_{c}"] for c in STRUCTURAL]
    out["recall_structural"] = float(np.nanmean(rec))
    total = true = 0
    for w in measured:
        for account in by_index[w.index]:
            total += 1
            if account in planted and w.index >= planted[account]:
                true += 1
    out["alerts"] = total
    out["precision"] = true / total if total else float("nan")
    shares = [len(by_index[w.index]) / max(active[w.index], 1) for w in measured]
    out["alert_share_mean"] = float(np.mean(shares)) if shares else float("nan")
    out["alert_share_max"] = float(np.max(shares)) if shares else float("nan")
    controls = [r for r in run.truth if r["change"] == "volume_control"]
    flagged = sum(
        any(r["account"] in by_index[i] for i in by_index if i >= r["window_index"])
        for r in controls
    )
    out["volume_control_fa"] = flagged / len(controls) if controls else float("nan")
    season = run.meta["season_window"]
    out["season_share"] = (
        len(by_index.get(season, ())) / max(active.get(season, 1), 1)
        if season in by_index
        else float("nan")
    )
    newcomers = [r for r in run.truth if r["change"] == "newcomer"]
    flagged_new = sum(any(r["account"] in a for a in alerts) for r in newcomers)
    out["newcomer_fa"] = flagged_new / len(newcomers) if newcomers else float("nan")
    fresh_alerts = sum(a.startswith("new-") for w in measured for a in by_index[w.index])
    out["fresh_alert_share"] = fresh_alerts / total if total else float("nan")
    return out


def summarise(per_seed: Iterable[dict]) -> dict:
    """Mean, standard deviation, min and max of every figure over seeds."""
    rows = list(per_seed)
    keys = rows[0].keys() if rows else ()
    summary: dict[str, dict[str, float | None]] = {}
    for key in keys:
        values = np.array([r[key] for r in rows], dtype=np.float64)
        finite = values[np.isfinite(values)]
        if finite.size == 0:
            summary[key] = {"mean": None, "std": None, "min": None, "max": None}
            continue
        summary[key] = {
            "mean": float(finite.mean()),
            "std": float(finite.std()),
            "min": float(finite.min()),
            "max": float(finite.max()),
        }
    return summary


def evaluate(settings, *, seeds: Sequence[int], members: int, weeks: int, progress=None) -> dict:
    """Run both detectors on every seed; return per-seed figures and their summaries."""
    role_rows, volume_rows, full_rows = [], [], []
    for seed in seeds:
        run, _ = run_seed(settings, seed=seed, members=members, weeks=weeks)
        role = [w.alerts for w in run.windows]
        volume = volume_alerts(run, [len(a) for a in role])
        full = volume_alerts(
            run, [int(np.floor(settings.alert_budget * len(w.nodes))) for w in run.windows]
        )
        role_rows.append({"seed": seed, **score_alerts(run, role)})
        volume_rows.append({"seed": seed, **score_alerts(run, volume)})
        full_rows.append({"seed": seed, **score_alerts(run, full)})
        if progress is not None:
            progress(seed, role_rows[-1], volume_rows[-1])
    strip = lambda rows: [{k: v for k, v in r.items() if k != "seed"} for r in rows]  # noqa: E731
    return {
        "seeds": list(seeds),
        "members": members,
        "weeks": weeks,
        "alert_budget": settings.alert_budget,
        "role_shift": {"per_seed": role_rows, "summary": summarise(strip(role_rows))},
        # the same number of alerts as the role-shift run, window by window
        "volume_baseline": {"per_seed": volume_rows, "summary": summarise(strip(volume_rows))},
        # the whole budget: alert_budget of the active accounts in every window
        "volume_full_budget": {"per_seed": full_rows, "summary": summarise(strip(full_rows))},
    }


# --- the table -----------------------------------------------------------------------------

ROWS = (
    [(f"recall {c} (≤ 1 window)", f"recall_{c}", "share") for c in STRUCTURAL]
    + [("recall, structural mean", "recall_structural", "share")]
    + [(f"median delay {c} (windows)", f"delay_{c}", "number") for c in STRUCTURAL]
    + [
        ("precision (planted account alerted)", "precision", "share"),
        ("alerts per window / active (mean)", "alert_share_mean", "percent"),
        ("alerts per window / active (max)", "alert_share_max", "percent"),
        ("volume controls alerted", "volume_control_fa", "share"),
        ("season window alerts / active", "season_share", "percent"),
        ("newcomers alerted", "newcomer_fa", "share"),
        ("alerts on fresh new-… accounts / all", "fresh_alert_share", "share"),
    ]
)


def _cell(stats: dict, kind: str) -> str:
    if stats["mean"] is None:
        return "n/a"
    scale, fmt = (100.0, "{:.2f}%") if kind == "percent" else (1.0, "{:.2f}")
    mean, std = stats["mean"] * scale, stats["std"] * scale
    lo, hi = stats["min"] * scale, stats["max"] * scale
    return f"{fmt.format(mean)} ± {fmt.format(std)} [{fmt.format(lo)}–{fmt.format(hi)}]"


def format_table(report: dict) -> str:
    """A Markdown table: one row per figure, role shift beside the volume baseline."""
    role = report["role_shift"]["summary"]
    volume = report["volume_baseline"]["summary"]
    full = report["volume_full_budget"]["summary"]
    budget = report.get("alert_budget", 0.01)
    lines = [
        f"seeds {report['seeds']}, {report['members']} members, {report['weeks']} weeks; "
        "mean ± std [min–max] over seeds",
        "",
        "| figure | role shift | volume baseline, same alerts per window | "
        f"volume baseline, top {budget:.0%} of active |",
        "|---|---|---|---|",
    ]
    for label, key, kind in ROWS:
        lines.append(
            f"| {label} | {_cell(role[key], kind)} | {_cell(volume[key], kind)} | "
            f"{_cell(full[key], kind)} |"
        )
    return "\n".join(lines)


# --- command line ----------------------------------------------------------------------------


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="rolewatch evaluate",
        description="Measure detection on the fictional marketplace scenario: role shift "
        "through the service's own pipeline beside a volume baseline at the same budget.",
    )
    parser.add_argument(
        "--seeds", default="0,1,2", help="comma-separated scenario seeds (default 0,1,2)"
    )
    parser.add_argument("--members", type=int, default=3000, help="members (default 3000)")
    parser.add_argument("--weeks", type=int, default=16, help="weekly windows (default 16)")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="override a setting for this run, e.g. --set roles=8 (repeatable)",
    )
    parser.add_argument("--json", action="store_true", help="print the full report as JSON")
    return parser


def main(args=None) -> int:
    """``rolewatch evaluate [--seeds 0,1,2] [--members N] [--weeks W] [--set k=v] [--json]``.

    ``args`` is the CLI's namespace (its ``rest`` holds the arguments after the
    subcommand, its ``config`` the settings file) or a plain list of arguments.
    """
    import json

    from rolewatch.config import ConfigError, load_settings

    config = None
    if args is None:
        argv = sys.argv[1:]
    elif isinstance(args, (list, tuple)):
        argv = list(args)
    else:
        argv = list(getattr(args, "rest", []) or [])
        config = getattr(args, "config", None)
    options = _parser().parse_args(argv)
    try:
        seeds = [int(s) for s in options.seeds.split(",") if s.strip()]
    except ValueError:
        print(
            f"--seeds must be integers separated by commas, got {options.seeds!r}", file=sys.stderr
        )
        return 2
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

    def progress(seed, role, volume):
        print(
            f"seed {seed}: role shift recall {role['recall_structural']:.2f}, "
            f"volume baseline recall {volume['recall_structural']:.2f}",
            file=sys.stderr,
        )

    report = evaluate(
        settings, seeds=seeds, members=options.members, weeks=options.weeks, progress=progress
    )
    if options.json:
        print(json.dumps(report, indent=2))
    else:
        print(format_table(report))
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main(sys.argv[1:]))
