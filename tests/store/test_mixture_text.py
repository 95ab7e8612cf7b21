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
