"""How problems are worded: "did you mean", quoting what the user wrote, lists of problems and capped lengths.

Every message quotes what the user wrote, and what they wrote can be huge (a 50 MB file of unknown keys): quotes,
lists and whole messages are cut to a size a terminal shows, saying how much was left out.
"""

from __future__ import annotations

import difflib
from typing import Any, Iterable, Sequence

MAX_QUOTE = 80  # characters of one quoted value
MAX_LISTED = 10  # problems (or unknown keys) listed in one message
MAX_MESSAGE = 4000  # characters of one whole message


def quote(value: Any) -> str:
    """``repr`` of what the user wrote, cut to :data:`MAX_QUOTE` characters."""
    text = repr(value)
    if len(text) <= MAX_QUOTE:
        return text
    return f"{text[:MAX_QUOTE - 1]}… ({len(text):,} characters)"


def closest(word: str, choices: Iterable[str], n: int = 3) -> list[str]:
    """The choices nearest to ``word`` by difflib's ratio, best first (at least 0.6 alike)."""
    return difflib.get_close_matches(str(word), sorted({str(c) for c in choices}), n=n, cutoff=0.6)


def did_you_mean(word: str, choices: Iterable[str], n: int = 3) -> str:
    """``" (did you mean 'x'?)"``, ``" (did you mean 'x' or 'y'?)"`` or ``""`` when nothing is close."""
    near = closest(word, choices, n)
    if not near:
        return ""
    return " (did you mean " + " or ".join(f"'{c}'" for c in near) + "?)"


def some(items: Sequence[str], limit: int = MAX_LISTED, joiner: str = ", ", total: int | None = None) -> str:
    """The first ``limit`` items joined, then how many more there are (of ``total``, when only some were
    worded)."""
    total = len(items) if total is None else total
    shown = joiner.join(items[:limit])
    return shown + (f"{joiner}and {total - limit:,} more" if total > limit else "")


def cap(text: str, limit: int = MAX_MESSAGE) -> str:
    """``text`` cut to ``limit`` characters, saying how many were left out."""
    if len(text) <= limit:
        return text
    return f"{text[:limit]}… ({len(text) - limit:,} more characters)"


def problem_list(problems: Sequence[str], limit: int = MAX_LISTED) -> str:
    """Further problems after the first, one per line, at most ``limit`` of them."""
    if not problems:
        return ""
    lines = [f"\n  also {p}" for p in problems[:limit]]
    if len(problems) > limit:
        lines.append(f"\n  and {len(problems) - limit:,} more problem{'s' if len(problems) - limit > 1 else ''}")
    return "".join(lines)
