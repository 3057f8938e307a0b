"""Where the shipped data lives: the rule catalog, templates and JSON Schemas.

In a wheel, ``catalog/`` and ``templates/`` are copied inside the package. In a source checkout they sit at the
repository root, so we look there second.
"""

from __future__ import annotations

import json
from functools import lru_cache, partial
from pathlib import Path
from typing import Any, Callable

_PACKAGE = Path(__file__).resolve().parent


def data_dir(name: str) -> Path:
    inside = _PACKAGE / name
    if inside.is_dir():
        return inside
    checkout = _PACKAGE.parent.parent / name
    if checkout.is_dir():
        return checkout
    raise FileNotFoundError(f"stagewatch is missing its {name}/ directory; reinstall the package")


@lru_cache(maxsize=None)
def schema(kind: str) -> dict[str, Any]:
    """The JSON Schema for ``kind`` (``pipeline``, ``plan``, ``catalog``, ``checks``)."""
    return json.loads((_PACKAGE / "schemas" / f"{kind}.schema.json").read_text(encoding="utf-8"))


SCHEMA_KINDS = ("pipeline", "plan", "catalog", "checks", "check-result", "counts")


def _bounded_duration(value: object) -> bool:
    """Format ``bounded-duration``: a duration, if the value is one, is at most two years."""
    from stagewatch import durations

    if not durations.is_duration(value):
        return True
    return durations.parse(str(value)) <= durations.MAX_SECONDS


def format_checker() -> Any:
    """The formats our schemas use beyond JSON Schema's own."""
    import jsonschema

    checker = jsonschema.FormatChecker(formats=())
    checker.checks("bounded-duration")(_bounded_duration)
    return checker


@lru_cache(maxsize=None)
def compiled(kind: str) -> Callable[[Any], Any]:
    """The compiled validator for ``kind`` (fastjsonschema): it says whether a document is valid, some 20 times
    faster than the interpreted one. Defaults in the schema are not filled in: a check must not change the data.
    It raises ``fastjsonschema.JsonSchemaValueException`` on the first violation; :func:`validator` then words
    the error."""
    formats = {"bounded-duration": _bounded_duration}
    try:  # compiled when the wheel was built (hatch_build.py), if still made from this very schema
        import hashlib
        import importlib

        shipped = importlib.import_module(f"stagewatch.compiled_schemas.{kind.replace('-', '_')}")
        raw = (_PACKAGE / "schemas" / f"{kind}.schema.json").read_bytes()
        if shipped.SCHEMA_SHA256 == hashlib.sha256(raw).hexdigest():
            return partial(shipped.validate, custom_formats=formats)
    except ImportError:  # a source checkout: compile now
        pass
    import fastjsonschema

    return fastjsonschema.compile(schema(kind), formats=formats, use_default=False)


@lru_cache(maxsize=None)
def validator(kind: str) -> Any:
    """The interpreted validator for ``kind`` (jsonschema), which resolves references between our schemas without
    any network. Used to word a violation the compiled validator found: every error, the best match, its path."""
    import jsonschema
    from referencing import Registry, Resource

    registry = Registry().with_resources(
        (schema(k)["$id"], Resource.from_contents(schema(k))) for k in SCHEMA_KINDS
        if (_PACKAGE / "schemas" / f"{k}.schema.json").exists())
    wording_validator = jsonschema.validators.extend(jsonschema.Draft202012Validator,
                                                     {"required": _required_unless_misspelt})
    return wording_validator(schema(kind), registry=registry, format_checker=format_checker())


def _required_unless_misspelt(validator: Any, required: list[str], instance: Any, schema: dict[str, Any]) -> Any:
    """jsonschema's ``required``, except for a missing key that an unknown key beside it is a near spelling of
    (``outptu`` for ``output``): the unknown key's own error names it ("did you mean"), on the typo's line, so one
    typo is reported once. A missing key that no typo explains is still reported. The compiled validator still
    refuses the document, so this changes only the wording."""
    import jsonschema

    from stagewatch import wording

    if not validator.is_type(instance, "object"):
        return
    allowed = schema.get("properties") or {}
    unknown = [str(k) for k in instance if k not in allowed] if schema.get("additionalProperties") is False else []
    explained = {near for key in unknown for near in wording.closest(key, allowed)}
    for key in required:
        if key not in instance and key not in explained:
            yield jsonschema.ValidationError(f"{key!r} is a required property")
