"""Alert headlines: what moved, and never "X → X"."""

import math

import pytest

from rolewatch.engine.headline import (
    LEADS,
    WEAKEST,
    change_text,
    compose_headline,
    measure_moves,
    move_text,
)


def test_same_role_says_what_moved():
    before = {"events_out": 1.0, "out_degree": 1.0, "reciprocity": 0.0}
    after = {"events_out": 48.0, "out_degree": 38.0, "reciprocity": 0.0}
    moves = measure_moves(before, after, new_counterparts=37, new_counterparts_before=0)
    change = change_text(moves, same_role=True)
    headline = compose_headline(
        "quiet sender", "quiet sender", same_role=True, change=change, baseline=True
    )
    assert headline.startswith("same role (quiet sender): ")
    assert "quiet sender → quiet sender" not in headline
    assert "37 new counterparts" in headline and "sends 48× more" in headline


def test_a_role_change_names_both_roles_and_the_strongest_move():
    before = {"sent_share": 0.9, "events_in": 2.0}
    after = {"sent_share": 0.1, "events_in": 3.0}
    change = change_text(measure_moves(before, after), same_role=False)
    assert change == "share sent 90% → 10%"
    assert compose_headline(
        "busy sender", "busy receiver", same_role=False, change=change, baseline=True
    ) == ("busy sender → busy receiver: share sent 90% → 10%")


def test_moves_are_ranked_on_one_scale():
    # a doubling (log2 of 3/2... ) against a 30-point swing in a share (4 × 0.3 = 1.2)
    moves = measure_moves(
        {"events_out": 1.0, "clustering": 0.5}, {"events_out": 3.0, "clustering": 0.2}
    )
    assert [m.measure for m in moves] == ["clustering", "events_out"]
    assert moves[0].strength == pytest.approx(1.2)
    assert moves[1].strength == pytest.approx(math.log2(4 / 2))
    assert measure_moves({"events_out": 10.0}, {"events_out": 10.5}) == []  # below WEAKEST
    assert WEAKEST > 0


def test_missing_before_values_are_skipped():
    moves = measure_moves(
        {"events_out": None, "in_degree": float("nan")}, {"events_out": 5.0, "in_degree": 3.0}
    )
    assert moves == []
    assert change_text(moves, same_role=True) == "role mixture shifted"


@pytest.mark.parametrize(
    ("before", "after", "text"),
    [
        (0.0, 12.0, "sends 12 events, none before"),
        (6.0, 0.0, "sends no events (6 before)"),
        (40.0, 4.0, "sends 10× less"),
        (2.0, 5.0, "sends 2.5× more"),
    ],
)
def test_flow_texts(before, after, text):
    (move,) = measure_moves({"events_out": before}, {"events_out": after})
    assert move_text(move) == text


def test_renamed_roles_with_one_name_still_read_as_a_change():
    text = compose_headline(
        "trader", "trader", same_role=False, change="sends 3× more", baseline=True
    )
    assert "another role of that name" in text


@pytest.mark.parametrize(
    ("baseline", "start"), [(False, "no earlier window"), (True, "too little activity before")]
)
def test_without_a_role_before(baseline, start):
    text = compose_headline(
        None, "busy sender", same_role=False, change="12 new counterparts", baseline=baseline
    )
    assert text == f"{start} → busy sender: 12 new counterparts"


def test_the_measure_behind_the_score_comes_first_however_weak():
    # the novelty component raised the alert: new counterparts lead even against a stronger
    # (but unrelated) move
    moves = measure_moves(
        {"events_in": 1.0},
        {"events_in": 20.0},
        new_counterparts=31,
        new_counterparts_before=27,
        lead=LEADS["novelty_out"],
    )
    assert change_text(moves, same_role=True) == "31 new counterparts, receives 20× more"


def test_one_event_is_singular():
    (move,) = measure_moves({"events_out": 0.0}, {"events_out": 1.0})
    assert move_text(move) == "sends 1 event, none before"


def test_events_and_accounts_in_one_direction_are_not_both_said():
    moves = measure_moves(
        {"events_out": 4.0, "out_degree": 4.0, "reciprocity": 0.5},
        {"events_out": 0.0, "out_degree": 0.0, "reciprocity": 0.0},
    )
    assert change_text(moves, same_role=True) == "sends no events (4 before), two-way ties 50% → 0%"
