"""Account ids, event ids and kinds: the character rule ingest enforces, and the visible form
in which pages and chat messages show stored text.

Two ids that look the same to a person must be the same id, or an alert about one account
can be read as being about another. Ingest therefore refuses, in every text field of an
event, characters of the Unicode general categories (Unicode Standard, chapter 4.5)

* Cc (controls), Cf (format: direction overrides and isolates, zero-width characters, the
  byte order mark, the soft hyphen), Cs (lone surrogates, which UTF-8 cannot hold),
* Zl and Zp (line and paragraph separators),

and text that starts or ends with whitespace (Python's ``str.isspace``: spaces, tabs,
no-break and other Unicode spaces), which also refuses whitespace-only text. Spaces inside an
id, letters and marks of any script stay allowed.

Text stored before this rule, or characters the rule allows but a reader may not see, are
shown by :func:`visible` as ``<U+XXXX>``.
"""

from __future__ import annotations

import re
import unicodedata

REFUSED_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp"})
_ASCII_CONTROL = re.compile("[\x00-\x1f\x7f]")
# Shown as <U+XXXX>: every "other" (C*) and every separator (Z*) but the ordinary space.
_SHOWN_AS_CODE = frozenset({"Cc", "Cf", "Cs", "Co", "Cn", "Zl", "Zp", "Zs"})


def _describe(character: str) -> str:
    name = unicodedata.name(character, "")
    return f"U+{ord(character):04X}" + (f" {name}" if name else "")


def text_problem(value: str) -> str | None:
    """Why ``value`` breaks the character rule (position and character named), or None."""
    if value != value.strip():
        edge = value[0] if value[0].isspace() else value[-1]
        where = "starts" if value[0].isspace() else "ends"
        return (
            f"{where} with whitespace ({_describe(edge)}); remove leading and trailing whitespace"
        )
    if value.isascii():
        found = _ASCII_CONTROL.search(value)
        if found is None:
            return None
        position, character = found.start(), found.group()
    else:
        position, character = next(
            (
                (index, character)
                for index, character in enumerate(value)
                if unicodedata.category(character) in REFUSED_CATEGORIES
            ),
            (-1, ""),
        )
        if position < 0:
            return None
    kind = "control" if unicodedata.category(character) == "Cc" else "invisible or format"
    return f"contains the {kind} character {_describe(character)} at position {position}; remove it"


def plain_ascii(value: str) -> bool:
    """True for ASCII text that passes the rule (the common case, checked fast)."""
    return (
        value.isascii()
        and _ASCII_CONTROL.search(value) is None
        and value[:1] != " "
        and value[-1:] != " "
    )


def visible(value: str) -> str:
    """``value`` with each character a reader could miss or misread written as ``<U+XXXX>``:
    controls, format characters, private-use and unassigned code points, separators other
    than the ordinary space, and a space at either end."""
    if value.isascii() and _ASCII_CONTROL.search(value) is None:
        if value[:1] != " " and value[-1:] != " ":
            return value
    last = len(value) - 1
    shown = []
    for index, character in enumerate(value):
        category = unicodedata.category(character)
        at_edge = character == " " and index in (0, last)
        if at_edge or (category in _SHOWN_AS_CODE and character != " "):
            shown.append(f"<U+{ord(character):04X}>")
        else:
            shown.append(character)
    return "".join(shown)
