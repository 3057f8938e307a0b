"""Checks and conversions of interview answers: numbers, durations, stage names, `name:type` field lists.

Each returns an error text (or raises ValueError with it) that the prompt shows under the question.
"""

from __future__ import annotations

import re
from typing import Any, Callable

from stagewatch import durations
from stagewatch.wording import did_you_mean

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


def _parse_fields(value: Any) -> list[dict[str, Any]]:
    """Declared fields from an answer; ValueError with the reason otherwise.

    At the prompt the README's form, ``"weight_g:numeric, variety:category"``; an answers file or a draft may also
    give a list of such texts, a mapping ``{weight_g: numeric}``, or field mappings as in a pipeline description
    (``[{name: weight_g, type: numeric, range: [0, 900]}]``).
    """
    entries: list[Any]
    if isinstance(value, dict):
        entries = [{"name": k, "type": v} for k, v in value.items()]
    elif isinstance(value, list):
        entries = value
    elif value is None or isinstance(value, str):
        entries = [value or ""]
    else:
        raise ValueError(f"{value!r}: write name:type, comma separated")
    out: list[dict[str, Any]] = []
    for entry in entries:
        if isinstance(entry, str):
            for part in [p.strip() for p in entry.split(",") if p.strip()]:
                name, _, kind = part.partition(":")
                out.append(_field(part, {"name": name.strip(), "type": kind.strip()}))
        elif isinstance(entry, dict):
            out.append(_field(f"{entry.get('name')}:{entry.get('type')}", entry))
        else:
            raise ValueError(f"{entry!r}: write name:type, or a mapping with name and type")
    names = [f["name"] for f in out]
    for name in names:
        if names.count(name) > 1:
            raise ValueError(f"'{name}' is listed twice")
    return out


_FIELD_EXTRAS = ("unknown_value", "range", "categories", "description")  # checked with the description's schema


def _field(text: str, entry: dict[str, Any]) -> dict[str, Any]:
    name, kind = entry.get("name"), entry.get("type")
    if not isinstance(name, str) or not re.match(r"^[a-z][a-z0-9_]{0,62}$", name):
        raise ValueError(f"'{name}': field names use lower case letters, digits or _")
    if kind not in FIELD_TYPES:
        raise ValueError(f"'{text}': write name:type with type one of {', '.join(FIELD_TYPES)}")
    unknown = [k for k in entry if k not in ("name", "type", *_FIELD_EXTRAS)]
    if unknown:
        raise ValueError(f"field '{name}': unknown key '{unknown[0]}'{did_you_mean(str(unknown[0]), _FIELD_EXTRAS)}")
    return {"name": name, "type": kind, **{k: entry[k] for k in _FIELD_EXTRAS if k in entry}}


def _fields_text(fields: list[dict[str, Any]]) -> str:
    return ", ".join(f"{f['name']}:{f['type']}" for f in fields)


def _optional_positive(value: Any) -> str | None:
    return None if value is None else _positive(value)


def _share(value: Any) -> str | None:
    try:
        return None if 0 < float(value) <= 1 else "must be a share above 0 and at most 1, such as 0.05"
    except (TypeError, ValueError):
        return "must be a number, such as 0.05 or 1"


def _note(value: Any) -> str | None:
    return None if str(value or "").strip() else "a rejection needs a reason"


def _stage_count(text: Any) -> int:
    return int(text) if str(text).strip().isdigit() else -1


def _count_range(value: Any) -> str | None:
    return None if isinstance(value, int) and 0 <= value <= 200 else "a whole number from 0 to 200"


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
