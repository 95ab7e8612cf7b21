"""Checks every planted scenario (forum, payments, guilds) must pass, on a small draw each.

Self-consistency checks on invented data, computed from the raw events with numpy, sets and
networkx (see scenario_checks.py); each scenario's own shape is checked in its test module.
"""

import sys
from pathlib import Path

import pytest

from rolewatch.scenario import forum, guilds, payments

sys.path.insert(0, str(Path(__file__).parent))
import scenario_checks as checks  # noqa: E402

GENERATORS = {"forum": forum.generate, "payments": payments.generate, "guilds": guilds.generate}


@pytest.fixture(scope="module", params=sorted(GENERATORS))
def named(request):
    return request.param, GENERATORS[request.param](seed=11, **checks.SMALL)


@pytest.mark.parametrize("name", sorted(GENERATORS))
def test_same_seed_same_draw_and_other_seed_differs(name):
    checks.check_determinism(GENERATORS[name])


def test_events_are_valid_wire_format(named):
    checks.check_wire_format(named[1])


def test_every_type_is_planted_in_allowed_windows(named):
    checks.check_truth_types_and_windows(named[1])


def test_truth_accounts_exist_with_baselines(named):
    checks.check_truth_accounts_in_events(named[1])


def test_takeovers_fan_out_to_new_counterparts(named):
    checks.check_takeover(named[1])
    checks.check_takeover_prior_activity_varies(named[1])


def test_volume_controls_keep_their_counterparts(named):
    checks.check_volume_controls(named[1])


def test_contact_points_funnels_reversals_bridges(named):
    scenario = named[1]
    checks.check_contact_points(scenario)
    checks.check_funnels(scenario)
    checks.check_reversals(scenario)
    checks.check_bridges(scenario)


def test_quiet_season_and_activity_shape(named):
    scenario = named[1]
    checks.check_quiet(scenario)
    checks.check_season(scenario)
    checks.check_activity_shape(scenario)
    checks.check_daily_rhythm(scenario)
