"""The phrase rule role descriptions must pass: no phrase in more than half of them.

A *phrase* is any run of three consecutive words (numbers and percentages count as words;
case and punctuation are ignored). Longer shared phrases contain a shared three-word run,
so checking runs of three covers every phrase of three or more words.
"""

import re
from collections import Counter

WORD = re.compile(r"[\w%×.·-]+")


def words(text: str) -> list[str]:
    found = (w.strip(".,;:()") for w in WORD.findall(text.lower()))
    return [w for w in found if w]


def phrases(text: str, n: int = 3) -> set[str]:
    tokens = words(text)
    return {" ".join(tokens[i : i + n]) for i in range(len(tokens) - n + 1)}


def most_shared_phrase(descriptions: list[str]) -> tuple[str, int]:
    """The phrase in most descriptions and how many hold it (("", 0) when none)."""
    counts = Counter(p for d in descriptions for p in phrases(d))
    return counts.most_common(1)[0] if counts else ("", 0)


def phrase_rule_holds(descriptions: list[str]) -> bool:
    """No phrase in more than half of the descriptions (vacuous for a single role)."""
    if len(descriptions) < 2:
        return True
    return most_shared_phrase(descriptions)[1] <= len(descriptions) // 2
