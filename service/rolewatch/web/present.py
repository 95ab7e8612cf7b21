"""Words and numbers for the pages: formatting filters."""

from __future__ import annotations

import math
from typing import Any

from markupsafe import Markup

from rolewatch.engine import readable
from rolewatch.identifiers import visible


def number(value: Any) -> str:
    """A feature or count value: whole numbers without decimals, others with two."""
    if value is None:
        return "–"
    value = float(value)
    if not math.isfinite(value):
        return "–"
    if value == int(value) and abs(value) < 1e15:
        return f"{int(value):,}"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    return f"{value:,.2f}"


def percent(value: Any) -> str:
    if value is None:
        return "–"
    return f"{float(value):.0%}"


def score(value: Any) -> str:
    if value is None:
        return "–"
    return f"{float(value):.2f}"


def feature_label(name: str) -> str:
    """A ReFeX feature in words ("average counterparts of the accounts it writes to"), never
    a nested formula (:func:`rolewatch.engine.readable.feature_label`)."""
    return readable.feature_label(str(name))


def shown_id(value: Any) -> Markup:
    """An account id as page markup: isolated from the text around it (``<bdi>``, so
    right-to-left characters cannot reorder its neighbours, HTML 5 section 4.5.24) and with
    any character a reader could miss written as ``<U+XXXX>`` (escaped for HTML)."""
    return Markup("<bdi>{}</bdi>").format(visible(str(value)))
