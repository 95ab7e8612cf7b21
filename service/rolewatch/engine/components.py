"""The components of an account's shift score, each a z-score against its own baseline.

The role mixture stays what an alert is about; beside it, the account's ties say what a
scale-free mixture cannot see. Every component compares the current window with the
account's own past (:mod:`rolewatch.engine.calibration` holds the tests):

``novelty_out`` / ``novelty_in``
    New counterparts it sent to / received from, against its own rate of meeting new
    ones over its earlier windows (fan-out after a takeover; a new contact point).
``ties``
    The shares of its counterparts in the four cells out/in x known/new
    (:mod:`rolewatch.engine.ties`) against the baseline window (known contacts swapped for
    strangers; a collector fed by unknown payers).
``direction``
    The shares of events it sent and received against the baseline window (a reversal).
``bridging``
    Ties into communities its home community hardly deals with, communities taken from
    the window before (:mod:`rolewatch.engine.bridging`): a new broker.
``role``
    The role-mixture shift (:func:`rolewatch.engine.shift.role_aware_distance`) as an
    evidence-weighted chi-square (:func:`rolewatch.engine.calibration.role_shift_zscore`).

Each of the count components is re-standardised per window by the empirical null
(:func:`rolewatch.engine.calibration.empirical_null`); the bridging z-score is a Poisson
tail already corrected for the communities it touches and is taken as it is.

Pure: arrays in, arrays out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from rolewatch.engine.calibration import (
    empirical_null,
    homogeneity_zscore,
    novelty_zscore,
    role_shift_zscore,
)

__all__ = ["COMPONENTS", "TieEvidence", "component_zscores"]

COMPONENTS = ("novelty_out", "novelty_in", "ties", "direction", "bridging", "role")


@dataclass(frozen=True)
class TieEvidence:
    """Tie-level counts of the scored window and of the account's past, one row per account.

    Attributes
    ----------
    cells, baseline_cells : ndarray, shape (n, 4)
        Distinct counterparts out-known, out-new, in-known, in-new
        (:data:`rolewatch.engine.ties.TIE_CELLS`) now and in the baseline window (NaN rows
        where there is no baseline).
    events, baseline_events : ndarray, shape (n, 2)
        Events sent and received now and in the baseline window (NaN rows: none).
    history_new : ndarray, shape (n, 2)
        New counterparts sent to / received from, summed over the account's earlier
        active windows (at most ``ShiftPolicy.novelty_windows`` of them).
    history_windows : ndarray, shape (n,)
        How many earlier active windows ``history_new`` sums (0: none).
    """

    cells: np.ndarray
    baseline_cells: np.ndarray
    events: np.ndarray
    baseline_events: np.ndarray
    history_new: np.ndarray
    history_windows: np.ndarray

    def __post_init__(self) -> None:
        n = np.asarray(self.cells).shape[0]
        shapes = {
            "cells": (n, 4),
            "baseline_cells": (n, 4),
            "events": (n, 2),
            "baseline_events": (n, 2),
            "history_new": (n, 2),
            "history_windows": (n,),
        }
        for name, shape in shapes.items():
            if np.asarray(getattr(self, name)).shape != shape:
                raise ValueError(
                    f"TieEvidence.{name} must have shape {shape}, "
                    f"got {np.asarray(getattr(self, name)).shape}"
                )


def component_zscores(
    scored: np.ndarray,
    *,
    ties: TieEvidence | None,
    bridging: np.ndarray | None,
    distance: np.ndarray,
    current_events: np.ndarray,
    baseline_events: np.ndarray,
    strata: np.ndarray,
    n_roles: int,
    smoothing: float,
    wanted: tuple[str, ...] = COMPONENTS,
) -> dict[str, np.ndarray]:
    """Every wanted component's z-score for the scored accounts (NaN elsewhere).

    Parameters
    ----------
    scored : ndarray of bool, shape (n,)
        Accounts with a baseline and enough activity to be scored.
    ties : TieEvidence or None
        Tie-level counts; None leaves the tie components out.
    bridging : ndarray, shape (n,), or None
        Bridging z-scores of this window against the reference communities
        (:func:`rolewatch.engine.bridging.bridging_zscore`); None leaves it out.
    distance : ndarray, shape (n,)
        Role-mixture distance between the current and baseline mixtures.
    current_events, baseline_events : ndarray, shape (n,)
        Events now and in the baseline window (the role component's sample sizes).
    strata : ndarray of int, shape (n,)
        Activity strata for the role component's genomic control.
    n_roles : int
    smoothing : float
        Pseudo-counts of the homogeneity tests' baselines.
    wanted : tuple of str
        Components to compute (a subset of :data:`COMPONENTS`).

    Returns
    -------
    dict of str to ndarray
        In :data:`COMPONENTS` order, only the wanted ones that could be computed.
    """
    out: dict[str, np.ndarray] = {}
    if ties is not None:
        has_history = scored & (np.asarray(ties.history_windows) >= 1)
        has_baseline = scored & np.isfinite(ties.baseline_cells).all(axis=1)
        for column, name in ((0, "novelty_out"), (1, "novelty_in")):
            if name in wanted:
                raw = novelty_zscore(
                    ties.cells[:, 2 * column + 1],
                    ties.history_new[:, column],
                    ties.history_windows,
                    has_history,
                )
                out[name] = empirical_null(raw, has_history)[0]
        if "ties" in wanted:
            raw = homogeneity_zscore(
                ties.cells, ties.baseline_cells, has_baseline, smoothing=smoothing
            )
            out["ties"] = empirical_null(raw, has_baseline)[0]
        if "direction" in wanted:
            raw = homogeneity_zscore(
                ties.events, ties.baseline_events, has_baseline, smoothing=smoothing
            )
            out["direction"] = empirical_null(raw, has_baseline)[0]
    if bridging is not None and "bridging" in wanted:
        out["bridging"] = np.where(scored, np.asarray(bridging, dtype=np.float64), np.nan)
    if "role" in wanted:
        out["role"] = role_shift_zscore(
            distance, current_events, baseline_events, strata, scored, n_roles=n_roles
        )
    return {name: out[name] for name in COMPONENTS if name in out}
