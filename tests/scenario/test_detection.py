"""Detection through the real offline pipeline on a small draw of every scenario.

The scenarios are invented, so these are regression guards on the ground truth their
generators plant, run with the service's default settings through
:func:`rolewatch.pipeline.offline.run_offline` (the closer's code path): fan-out after a
takeover must be alerted (in its window or the next) and accounts that only grow in volume
with the same counterparts must not. Each draw takes seconds (400 members, 10 weeks).
"""

from __future__ import annotations

import pytest

from rolewatch.config import load_settings
from rolewatch.evaluation.figures import figures
from rolewatch.evaluation.runs import capture_scenario
from rolewatch.pipeline.compute import policy_from_settings
from rolewatch.scenario import SCENARIOS
from rolewatch.scenario.evaluate import main


@pytest.mark.parametrize("name", sorted(SCENARIOS))
def test_fan_out_after_takeover_is_caught_and_volume_only_controls_are_not(name):
    settings = load_settings(None)
    run = capture_scenario(settings, name, seed=7, members=400, weeks=10)
    alerts = run.alerts_under(policy_from_settings(settings))
    # re-scoring the kept inputs gives exactly what the pipeline raised
    assert alerts == [set(window.alerts) for window in run.windows]
    training = [window.training for window in run.windows]
    out = figures(run.truth, run.meta, alerts, run.active(), training)
    assert [r for r in run.truth if r["change"] == "takeover"], "the draw plants takeovers"
    assert out["recall_takeover"] == 1.0
    assert out["control_volume_control"] == 0.0
    assert out["alert_share_max"] <= settings.alert_budget
    for window, alerted in zip(run.windows, alerts, strict=True):
        assert not window.training or not alerted


def test_cli_entry_rejects_bad_arguments(capsys):
    assert main(["--seeds", "zero", "--cache", "none"]) == 2
    assert "--seeds" in capsys.readouterr().err
    assert main(["--scenario", "harbour", "--cache", "none"]) == 2
    assert "unknown scenario" in capsys.readouterr().err
