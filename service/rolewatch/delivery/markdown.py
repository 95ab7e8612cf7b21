"""Account ids in chat text: a Markdown code span, so no id becomes a link, emphasis or a
heading in the chat client, whatever characters it holds.

The span follows CommonMark 0.31.2, section 6.1 "Code spans": it is fenced by a run of
backticks longer than any run inside the id, and padded with one space on each side when
the id starts or ends with a backtick or a space (the parser strips exactly one from each
side). Characters a reader could miss are first written as ``<U+XXXX>``
(:func:`rolewatch.identifiers.visible`), so two ids that differ only by such a character
never read the same.
"""

from __future__ import annotations

import re

from rolewatch.identifiers import visible

_BACKTICK_RUNS = re.compile("`+")


def code_span(text: str) -> str:
    """``text`` as one CommonMark code span whose content is ``text`` exactly."""
    longest = max((len(run) for run in _BACKTICK_RUNS.findall(text)), default=0)
    fence = "`" * (longest + 1)
    padded = text.startswith(("`", " ")) or text.endswith(("`", " "))
    inner = f" {text} " if padded else text
    return f"{fence}{inner}{fence}"


def account_code(account: object, table: dict[int, str] | None = None, limit: int = 200) -> str:
    """An account id for chat text: visible characters, then ``table`` (``str.translate``)
    applied, shortened, in a code span."""
    text = visible("" if account is None else str(account))
    if table:
        text = text.translate(table)
    if len(text) > limit:
        text = text[: limit - 1] + "…"
    return code_span(text)
