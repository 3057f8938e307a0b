"""Durations written the way Prometheus writes them: ``30s``, ``15m``, ``6h``, ``3d``, ``2w``."""

from __future__ import annotations

import re

_UNITS = {"s": 1, "m": 60, "h": 3600, "d": 86400, "w": 604800}
_PATTERN = re.compile(r"^([1-9][0-9]*)([smhdw])$")
PATTERN = _PATTERN.pattern
HOUR = 3600.0
WEEK = 604800.0
MAX_SECONDS = 730 * 86400  # two years: the longest window, reference, label delay or SLO period a plan may hold
MAX_TEXT = "730d (two years)"


def parse(text: str) -> int:
    """Seconds in ``text``; raises ValueError for anything but ``<positive integer><s|m|h|d|w>``.

    >>> parse("90m")
    5400
    """
    match = _PATTERN.match(str(text).strip())
    if not match:
        raise ValueError(f"{text!r} is not a duration such as 30s, 15m, 6h, 3d or 2w")
    return int(match.group(1)) * _UNITS[match.group(2)]


def is_duration(text: object) -> bool:
    return isinstance(text, str) and bool(_PATTERN.match(text.strip()))


def format(seconds: float) -> str:  # noqa: A001 - mirrors parse
    """The shortest exact spelling of ``seconds`` (whole seconds).

    >>> format(5400)
    '90m'
    """
    seconds = int(round(seconds))
    for unit in ("w", "d", "h", "m"):
        size = _UNITS[unit]
        if seconds >= size and seconds % size == 0:
            return f"{seconds // size}{unit}"
    return f"{seconds}s"
