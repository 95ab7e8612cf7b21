"""Stored mixture text is exactly what the standard library's ``json.dumps`` writes for the
rounded mixture (Python's json module as the reference; the values are generated here)."""

from __future__ import annotations

import json

import numpy as np

from rolewatch.store.memberships import MIXTURE_DECIMALS, _mixture_json


def test_mixture_text_is_json_dumps_of_the_rounded_weights():
    rng = np.random.default_rng(4)
    role_ids = (3, 0, 12)
    mixture = rng.dirichlet(np.ones(3), 500)
    mixture[:20, 0] = 1e-6  # written in exponent form by json
    mixture[20:40, 1] = 0.0
    mixture[40:60, 2] = 1.0
    mixture[60:80, 0] = 1e-9  # rounds to 0
    fitted = rng.random(500) > 0.2
    text = _mixture_json(role_ids, mixture, fitted)
    rounded = np.round(mixture, MIXTURE_DECIMALS)
    for row, written in enumerate(text):
        expected = (
            json.dumps({str(r): float(w) for r, w in zip(role_ids, rounded[row], strict=True)})
            if fitted[row]
            else "{}"
        )
        assert written == expected


def test_every_six_decimal_weight_is_written_as_json_dumps_writes_it():
    # every weight a mixture can be stored with, 0 to 1 in steps of 1e-6, and the same
    # steps beyond 1 and below 0, against json.dumps (the standard library as reference)
    steps = np.arange(0, 1_000_001) / 1e6
    values = np.concatenate([steps, 1.0 + steps[1::997], -steps[1::991]])
    values = np.concatenate([values, [np.nan, np.inf, -np.inf, -0.0, 123456.789]])
    mixture = values.reshape(-1, 1)
    text = _mixture_json((7,), mixture, np.ones(len(values), dtype=bool))
    rounded = np.round(values, MIXTURE_DECIMALS).tolist()
    assert text.tolist() == [json.dumps({"7": weight}) for weight in rounded]


def test_no_roles_or_no_rows_write_empty_mixtures():
    assert _mixture_json((), np.zeros((3, 0)), np.ones(3, dtype=bool)).tolist() == ["{}"] * 3
    assert _mixture_json((1, 2), np.zeros((0, 2)), np.ones(0, dtype=bool)).tolist() == []
