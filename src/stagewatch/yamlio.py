"""YAML in and out: line-aware loading, schema validation with line numbers, deterministic atomic writes."""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

import jsonschema
import yaml

from stagewatch.errors import StagewatchError
from stagewatch.safewrite import Snapshot, safe_write


@dataclass
class Document:
    """Parsed YAML plus its node tree, so that a path inside the data maps back to a line."""

    path: str
    data: Any
    root: yaml.Node | None
    digest: str | None = None  # SHA-256 of the bytes read, for the check before a file is replaced

    def snapshot(self) -> Snapshot:
        """What this file held when it was read, for ``write_atomic(..., expected=...)``."""
        return Snapshot(os.path.realpath(self.path), self.digest)

    def line_of(self, keys: Iterable[Any]) -> int | None:
        node = self.root
        line = node.start_mark.line + 1 if node is not None else None
        for key in keys:
            if isinstance(node, yaml.MappingNode):
                for knode, vnode in node.value:
                    if knode.value == str(key):
                        line = knode.start_mark.line + 1
                        node = vnode
                        break
                else:
                    return line
            elif isinstance(node, yaml.SequenceNode) and isinstance(key, int) and key < len(node.value):
                node = node.value[key]
                line = node.start_mark.line + 1
            else:
                return line
        return line


def _check_duplicate_keys(node: yaml.Node | None, path: str) -> None:
    if isinstance(node, yaml.MappingNode):
        seen: dict[str, int] = {}
        for knode, vnode in node.value:
            key = str(knode.value)
            if key in seen:
                raise StagewatchError(
                    f"key '{key}' appears twice in the same block (first on line {seen[key]})",
                    file=path,
                    line=knode.start_mark.line + 1,
                    expected="each key once",
                )
            seen[key] = knode.start_mark.line + 1
            _check_duplicate_keys(vnode, path)
    elif isinstance(node, yaml.SequenceNode):
        for item in node.value:
            _check_duplicate_keys(item, path)


_Loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)  # libyaml when present: the same result, much faster


def parse(text: str, path: str) -> Document:
    """Parse once: the node tree (for line numbers and duplicate keys), then the data built from it."""
    try:
        loader = _Loader(text)
        try:
            root = loader.get_single_node()
            _check_duplicate_keys(root, path)
            data = loader.construct_document(root) if root is not None else None
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise StagewatchError(
            f"this is not valid YAML: {exc.problem or exc}", file=path, line=line, expected="well-formed YAML"
        ) from None
    except yaml.YAMLError as exc:
        raise StagewatchError(f"this is not valid YAML: {exc}", file=path) from None
    return Document(path=path, data=data, root=root)


def load(path: str | os.PathLike[str]) -> Document:
    p = Path(path)
    try:
        raw = p.read_bytes()
        text = raw.decode("utf-8")
    except FileNotFoundError:
        raise StagewatchError("no such file", file=str(p)) from None
    except IsADirectoryError:
        raise StagewatchError("this is a directory, not a file", file=str(p)) from None
    except UnicodeDecodeError:
        raise StagewatchError("this file is not UTF-8 text", file=str(p)) from None
    except OSError as exc:
        raise StagewatchError(f"cannot read this file: {exc.strerror}", file=str(p)) from None
    doc = parse(text, str(p))
    doc.digest = hashlib.sha256(raw).hexdigest()
    return doc


def describe_error(error: jsonschema.ValidationError) -> tuple[str, str | None]:
    """A schema violation in words: (where and what, what was expected)."""
    where = ".".join(str(k) for k in error.absolute_path) or "top level"
    validator = error.validator
    if validator == "enum":
        return f"{where}: {error.instance!r} is not allowed", "one of " + ", ".join(map(str, error.validator_value))
    if validator == "required":
        return f"{where}: {error.message}", None
    if validator == "additionalProperties":
        allowed = sorted((error.schema.get("properties") or {}).keys())
        return f"{where}: {error.message}", ("keys among " + ", ".join(allowed)) if allowed else None
    if validator == "pattern":
        return f"{where}: {error.instance!r} has the wrong form", error.schema.get("description") or (
            f"text matching {error.validator_value}"
        )
    if validator == "type":
        return f"{where}: {error.instance!r} is the wrong type", f"{error.validator_value}"
    return f"{where}: {error.message}", error.schema.get("description")


def validate(doc: Document, schema: dict[str, Any], validator: Any = None) -> None:
    """Raise one StagewatchError for the most relevant schema violation, with its YAML line."""
    validator = validator or jsonschema.Draft202012Validator(schema)
    errors = list(validator.iter_errors(doc.data))
    if not errors:
        return
    best = jsonschema.exceptions.best_match(errors)
    # Descend into oneOf/anyOf to the most specific reason.
    while best.context:
        best = jsonschema.exceptions.best_match(best.context)
    message, expected = describe_error(best)
    where = list(best.absolute_path)
    if best.validator == "additionalProperties" and isinstance(best.instance, dict):
        extra = [k for k in best.instance if k not in (best.schema.get("properties") or {})]
        if extra:
            where.append(extra[0])
    more = f" ({len(errors) - 1} more problem{'s' if len(errors) > 2 else ''} after this one)" if len(errors) > 1 else ""
    raise StagewatchError(message + more, file=doc.path, line=doc.line_of(where), expected=expected)


class _Dumper(getattr(yaml, "CSafeDumper", yaml.SafeDumper)):  # type: ignore[misc]
    pass


def _str_presenter(dumper: yaml.SafeDumper, value: str) -> yaml.Node:
    if "\n" in value:
        return dumper.represent_scalar("tag:yaml.org,2002:str", value, style="|")
    return dumper.represent_scalar("tag:yaml.org,2002:str", value)


_Dumper.add_representer(str, _str_presenter)


def dump(data: Any) -> str:
    """Deterministic YAML: keys in insertion order, block style, wide lines."""
    return yaml.dump(data, Dumper=_Dumper, sort_keys=False, default_flow_style=False, width=110, allow_unicode=True)


def write_atomic(path: str | os.PathLike[str], text: str, *, inputs: Iterable[str | os.PathLike[str]] = (),
                 expected: Snapshot | None = None) -> None:
    """Write ``text`` to ``path`` through :func:`stagewatch.safewrite.safe_write` (the one write path)."""
    safe_write(path, text, inputs=inputs, expected=expected)
