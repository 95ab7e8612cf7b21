"""The benchmark's tables, in Markdown (README, docs/detection.md, the terminal)."""

from __future__ import annotations

from typing import Any

from .compare import BASELINES
from .figures import CONTROLS, STRUCTURAL

__all__ = ["format_real", "format_report", "cell"]

BASELINE_NAMES = {
    "volume": "volume z-score",
    "new_counterparts": "new counterparts",
    "midas_r": "MIDAS-R",
}
CONTROL_NAMES = {
    "volume_control": "volume controls alerted",
    "season": "season controls alerted",
    "newcomer": "newcomers alerted",
    "quiet": "quiet accounts alerted",
}


def _rows() -> list[tuple[str, str, str]]:
    rows = [
        (f"recall {c.replace('_', ' ')} (≤ 1 window)", f"recall_{c}", "share") for c in STRUCTURAL
    ]
    rows += [
        ("precision", "precision", "share"),
        ("alerts / active, mean", "alert_share_mean", "percent"),
        ("alerts / active, worst window", "alert_share_max", "percent"),
    ]
    rows += [(CONTROL_NAMES[c], f"control_{c}", "share") for c in CONTROLS]
    rows += [("season window alerts / active", "season_share", "percent")]
    return rows


def cell(stats: dict[str, Any] | None, kind: str, spread: bool = True) -> str:
    """``mean [min–max]`` of one figure (``n/a`` where it does not apply)."""
    if not stats or stats.get("mean") is None:
        return "n/a"
    scale, fmt = (100.0, "{:.2f}%") if kind == "percent" else (1.0, "{:.2f}")
    mean = fmt.format(stats["mean"] * scale)
    if not spread or stats["min"] == stats["max"]:
        return mean
    return f"{mean} [{fmt.format(stats['min'] * scale)}–{fmt.format(stats['max'] * scale)}]"


def format_report(report: dict[str, Any], *, mode: str = "matched") -> str:
    """One table per scenario: held-out figures of the role-shift score beside the
    baselines (``mode``: ``matched`` alert counts or the whole ``budget``)."""
    lines = [
        f"seeds {report['seeds']}, {report['members']} members, {report['weeks']} weekly "
        f"windows; budget {report['alert_budget']:.0%} of active accounts per window; "
        "mean [min–max] over seeds",
        "",
        f"defaults in use: {report['defaults']}; tuned on all scenarios: {report['tuned_on_all']}",
    ]
    which = "same number of alerts per window" if mode == "matched" else "whole budget"
    for name, held in report["held_out"].items():
        ours = held["role_shift"]["summary"]
        lines += [
            "",
            f"### {name} (held out; chosen on the others: {held['choice']})",
            "",
            "| figure | role shift | "
            + " | ".join(f"{BASELINE_NAMES[b]} ({which})" for b in BASELINES)
            + " |",
            "|---|---|" + "---|" * len(BASELINES),
        ]
        for label, key, kind in _rows():
            if ours.get(key, {}).get("mean") is None and key.startswith("recall"):
                continue
            baseline_cells = [
                cell(held["baselines"].get(b, {}).get(mode, {}).get(key), kind) for b in BASELINES
            ]
            lines.append(
                f"| {label} | {cell(ours.get(key), kind)} | " + " | ".join(baseline_cells) + " |"
            )
    return "\n".join(lines)


def format_real(real: dict[str, Any]) -> str:
    """The real network's label-free checks, the role-shift score beside the baselines."""
    source = real["source"]
    lines = [
        f"{source.get('name')} ({source.get('package')} {source.get('version')}): "
        f"{real['windows']} weekly windows, {real['training_windows']} for training; "
        f"{len(real['bursts'])} visible one-sided fan-out bursts from quiet accounts",
        "",
        "| detector | alerts | on accounts with ≤ 4 events | bursts alerted |",
        "|---|---|---|---|",
    ]
    for name, check in real["checks"].items():
        share = check["small_count_share"]
        label = "role shift" if name == "role_shift" else BASELINE_NAMES.get(name, name)
        lines.append(
            f"| {label} | {check['alerts']} | {check['small_count_alerts']}"
            f" ({'n/a' if share is None else f'{share:.0%}'}) | "
            f"{check['bursts_alerted']} of {len(real['bursts'])} |"
        )
    return "\n".join(lines)
