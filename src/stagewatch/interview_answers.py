"""Checks and conversions of interview answers: numbers, durations, stage names, `name:type` field lists.

Each returns an error text (or raises ValueError with it) that the prompt shows under the question.
"""

from __future__ import annotations

import re
from typing import Any, Callable

from stagewatch import durations

FIELD_TYPES = ("numeric", "category", "text", "duration", "flag")


# --- validators -----------------------------------------------------------------------------------------------


def _positive(value: Any) -> str | None:
    try:
        return None if float(value) > 0 else "must be a number above 0"
    except (TypeError, ValueError):
        return "must be a number, such as 1 or 0.5"


def _number(text: Any) -> float:
    try:
        value = float(text)
    except (TypeError, ValueError):
        raise ValueError("must be a number, such as 1200 or 0.5") from None
    return int(value) if value.is_integer() else value


def _optional_number(text: Any) -> float | None:
    if text is None or str(text).strip() == "":
        return None
    return _number(text)


def _parse_fields(text: Any) -> list[dict[str, str]]:
    """``"weight_g:numeric, variety:category"`` -> field dicts; ValueError with the reason otherwise."""
    if isinstance(text, list):  # from an answers file or a draft
        return text
    out: list[dict[str, str]] = []
    for part in [p.strip() for p in str(text or "").split(",") if p.strip()]:
        name, _, kind = part.partition(":")
        name, kind = name.strip(), kind.strip()
        if not re.match(r"^[a-z][a-z0-9_]{0,62}$", name):
            raise ValueError(f"'{name}': field names use lower case letters, digits or _")
        if kind not in FIELD_TYPES:
            raise ValueError(f"'{part}': write name:type with type one of {', '.join(FIELD_TYPES)}")
        if any(f["name"] == name for f in out):
            raise ValueError(f"'{name}' is listed twice")
        out.append({"name": name, "type": kind})
    return out


def _fields_text(fields: list[dict[str, Any]]) -> str:
    return ", ".join(f"{f['name']}:{f['type']}" for f in fields)


def _duration(value: Any) -> str | None:
    return None if durations.is_duration(value) else "must be a duration such as 30m, 12h or 3d"


def _name_validator(taken: set[str]) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        if not isinstance(value, str) or not re.match(r"^[a-z][a-z0-9_-]{0,62}$", value):
            return "use lower case letters, digits, _ or -, starting with a letter"
        if value == "pipeline":
            return "'pipeline' is reserved for metrics of the whole pipeline"
        if value in taken:
            return f"there is already a stage called '{value}'"
        return None

    return check
