"""YAML in and out: line-aware loading, schema validation with line numbers, deterministic atomic writes."""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable

import yaml

from stagewatch import wording, yamlnodes
from stagewatch.errors import StagewatchError
from stagewatch.safewrite import Snapshot, safe_write

if TYPE_CHECKING:
    import jsonschema


@dataclass
class Document:
    """Parsed YAML plus its node tree, so that a path inside the data maps back to a line."""

    path: str
    data: Any
    root: yaml.Node | None
    digest: str | None = None  # SHA-256 of the bytes read, for the check before a file is replaced
    text: str = ""  # the text read (a merge keeps the reviewers' comments from it)

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


# Limits on what a YAML file may hold. Plans and descriptions are far inside them (a 1,000-stage plan is about
# 20 MB, 10 levels deep, with no aliases); a file beyond them is hostile or broken, and is stopped with a message
# before it can take minutes or memory.
MAX_FILE_BYTES = 128 * 1024 * 1024
MAX_DEPTH = 64
MAX_ALIAS_EXPANSION = 100_000  # nodes that aliases add when the document is expanded
MAX_INTEGER_DIGITS = 18
DERIVED_KEY = "sizing"
_INT_TAG = "tag:yaml.org,2002:int"
_FLOAT_TAG = "tag:yaml.org,2002:float"


def _fail(node: yaml.Node, path: str, message: str, expected: str) -> StagewatchError:
    return StagewatchError(message, file=path, line=node.start_mark.line + 1, expected=expected)


def _check_scalar(node: yaml.ScalarNode, path: str, derived: bool) -> None:
    if node.tag == _INT_TAG:
        digits = sum(ch.isdigit() for ch in node.value)
        if digits > MAX_INTEGER_DIGITS:
            raise _fail(node, path, f"an integer of {digits} digits", f"at most {MAX_INTEGER_DIGITS} digits")
    elif node.tag == _FLOAT_TAG:
        text = node.value.replace("_", "").lower()
        try:
            finite = math.isfinite(float(text.replace(".inf", "inf").replace(".nan", "nan")))
        except ValueError:  # YAML 1.1 sexagesimal (1:30.5): finite by construction
            finite = True
        if not finite and not (derived and text in (".inf", "+.inf")):
            raise _fail(node, path, f"'{node.value}' is not a finite number", "a finite number")


def _check_keys(node: yaml.MappingNode, path: str) -> None:
    seen: dict[str, int] = {}
    for knode, _ in node.value:
        name = str(knode.value)
        if name in seen:
            raise StagewatchError(f"key '{name}' appears twice in the same block (first on line {seen[name]})",
                                  file=path, line=knode.start_mark.line + 1, expected="each key once")
        seen[name] = knode.start_mark.line + 1


def _check_plain_tree(root: yaml.Node, path: str) -> None:
    """The checks of :func:`_check_tree` for a document without anchors, so without aliases: every node is met
    once, and nothing needs to be remembered but the keys of the mapping at hand."""
    scalar, mapping = yaml.ScalarNode, yaml.MappingNode
    stack: list[tuple[yaml.Node, int, bool]] = [(root, 0, False)]
    while stack:
        node, depth, derived = stack.pop()
        if depth > MAX_DEPTH:
            raise _fail(node, path, f"blocks nested more than {MAX_DEPTH} deep", f"at most {MAX_DEPTH} levels")
        if isinstance(node, scalar):
            if node.tag in (_INT_TAG, _FLOAT_TAG):
                _check_scalar(node, path, derived)
            continue
        if isinstance(node, mapping):
            _check_keys(node, path)
            for knode, vnode in reversed(node.value):
                stack.append((vnode, depth + 1, derived or knode.value == DERIVED_KEY))
                stack.append((knode, depth + 1, derived))
        else:
            stack.extend((c, depth + 1, derived) for c in reversed(node.value))


def _check_tree(root: yaml.Node | None, path: str) -> None:
    """One pass over the node graph, without recursion: duplicate keys, depth, aliases that refer to themselves
    or expand too far (a few lines can expand to billions of nodes), integers too long to convert, NaN and infinity
    (allowed only inside a plan's ``sizing`` blocks, which stagewatch derives and rewrites on every propose: an
    undetectable change is written as ``.inf`` there).

    Aliases share one node, so each distinct node is checked once and the expanded size is summed, not walked.
    """
    if root is None:
        return
    expanded: dict[int, int] = {}  # id(node) -> nodes in its expanded subtree
    open_nodes: set[int] = set()
    stack: list[tuple[yaml.Node, int, bool, bool]] = [(root, 0, False, False)]
    while stack:
        node, depth, closing, derived = stack.pop()
        key = id(node)
        children: list[yaml.Node] = []
        if isinstance(node, yaml.MappingNode):
            children = [n for pair in node.value for n in pair]
        elif isinstance(node, yaml.SequenceNode):
            children = list(node.value)
        if closing:
            open_nodes.discard(key)
            expanded[key] = 1 + sum(expanded[id(c)] for c in children)
            continue
        if key in expanded:
            continue
        if key in open_nodes:
            raise _fail(node, path, "an alias refers to a block that contains it", "aliases to finished blocks")
        if depth > MAX_DEPTH:
            raise _fail(node, path, f"blocks nested more than {MAX_DEPTH} deep", f"at most {MAX_DEPTH} levels")
        if isinstance(node, yaml.ScalarNode):
            _check_scalar(node, path, derived)
            expanded[key] = 1
            continue
        if isinstance(node, yaml.MappingNode):
            _check_keys(node, path)
        open_nodes.add(key)
        stack.append((node, depth, True, derived))
        if isinstance(node, yaml.MappingNode):
            for knode, vnode in reversed(node.value):
                stack.append((vnode, depth + 1, False, derived or knode.value == DERIVED_KEY))
                stack.append((knode, depth + 1, False, derived))
        else:
            stack.extend((c, depth + 1, False, derived) for c in reversed(children))
    extra = expanded[id(root)] - len(expanded)
    if extra > MAX_ALIAS_EXPANSION:
        raise StagewatchError(f"aliases expand this document by {extra:.3g} nodes", file=path,
                              line=root.start_mark.line + 1,
                              expected=f"aliases that add at most {MAX_ALIAS_EXPANSION:,} nodes")


class _CachedResolve:
    """PyYAML's resolver (is this scalar text an int, a float, a bool, a date?) with its answers kept per text.

    Plans repeat the same texts thousands of times (statuses, severities, windows, numbers, the derivation of
    checks sized alike); the rules are PyYAML's own, so the result is the same."""

    _resolved: dict[tuple[str, Any], str] = {}

    def resolve(self, kind: type, value: Any, implicit: Any) -> Any:
        if kind is not yaml.ScalarNode:
            return super().resolve(kind, value, implicit)  # type: ignore[misc]
        key = (value, implicit)
        tag = self._resolved.get(key)
        if tag is None:
            tag = self._resolved[key] = super().resolve(kind, value, implicit)  # type: ignore[misc]
        return tag


class _Loader(_CachedResolve, getattr(yaml, "CSafeLoader", yaml.SafeLoader)):  # type: ignore[misc]
    """libyaml's parser when present (the same result as PyYAML's, much faster), with the cached resolver."""


def parse(text: str, path: str) -> Document:
    """Parse once: the node tree (for line numbers and duplicate keys), then the data built from it."""
    try:
        loader = _Loader(text)
        try:
            root = loader.get_single_node()
            if root is not None and "&" not in text:  # no anchor, so no alias: the short walk
                _check_plain_tree(root, path)
            else:
                _check_tree(root, path)
            try:
                data = loader.construct_document(root) if root is not None else None
            except (ValueError, TypeError, OverflowError) as exc:  # a value of a resolved type that cannot be built
                raise StagewatchError(f"a value cannot be read: {exc}", file=path,
                                      expected="plain text, numbers, lists and mappings") from None
        finally:
            loader.dispose()
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark else None
        raise StagewatchError(syntax_problem(exc), file=path, line=line, expected="well-formed YAML") from None
    except yaml.YAMLError as exc:
        raise StagewatchError(f"this is not valid YAML: {exc}", file=path) from None
    except RecursionError:  # the pure-Python parser, without libyaml, on very deep nesting
        raise StagewatchError("blocks nested too deep to read", file=path,
                              expected=f"at most {MAX_DEPTH} levels") from None
    return Document(path=path, data=data, root=root)


def load(path: str | os.PathLike[str]) -> Document:
    p = Path(path)
    try:
        if p.stat().st_size > MAX_FILE_BYTES:
            raise StagewatchError(f"this file is {p.stat().st_size / 2**20:.0f} MiB", file=str(p),
                                  expected=f"at most {MAX_FILE_BYTES // 2**20} MiB")
        if not p.is_file() and not p.is_dir():  # a FIFO or a device would block or never end
            raise StagewatchError("this is not a regular file", file=str(p), expected="a YAML file")
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
    doc.text = text
    return doc


def syntax_problem(exc: yaml.MarkedYAMLError) -> str:
    """A YAML syntax error in words: where the parser stopped and, for an unclosed construct, where it opened."""
    problem = f"this is not valid YAML: {exc.problem or exc}"
    if exc.problem_mark is not None:
        problem += f" (the parser stopped at line {exc.problem_mark.line + 1}, column {exc.problem_mark.column + 1})"
    if exc.context and exc.context_mark is not None and (
            exc.problem_mark is None or exc.context_mark.line != exc.problem_mark.line):
        construct = exc.context.removeprefix("while ").removeprefix("parsing ").removeprefix("scanning ")
        construct = construct.removeprefix("a ").removeprefix("an ")
        problem += f", in the {construct} that starts on line {exc.context_mark.line + 1}"
    return problem


def unknown_keys(error: "jsonschema.ValidationError") -> list[str]:
    """The keys an ``additionalProperties`` error refuses, in file order."""
    if not isinstance(error.instance, dict):
        return []
    allowed = error.schema.get("properties") or {}
    return [str(k) for k in error.instance if k not in allowed]


def describe_error(error: "jsonschema.ValidationError") -> tuple[str, str | None]:
    """A schema violation in words: (where and what, what was expected)."""
    where = ".".join(str(k) for k in error.absolute_path) or "top level"
    where = wording.cap(where, wording.MAX_QUOTE)
    validator = error.validator
    if validator == "enum":
        return (f"{where}: {wording.quote(error.instance)} is not allowed"
                + wording.did_you_mean(str(error.instance), map(str, error.validator_value)),
                "one of " + ", ".join(map(str, error.validator_value)))
    if validator == "required":
        return f"{where}: {error.message}", None
    if validator == "additionalProperties":
        allowed = sorted((error.schema.get("properties") or {}).keys())
        extra = unknown_keys(error)
        if len(extra) == 1:
            what = f"unknown key {wording.quote(extra[0])}" + wording.did_you_mean(extra[0], allowed)
        else:
            shown = [wording.quote(k) + wording.did_you_mean(k, allowed) for k in extra[:wording.MAX_LISTED]]
            what = f"{len(extra):,} unknown keys: " + wording.some(shown, total=len(extra))
        return f"{where}: {what}", ("keys among " + ", ".join(allowed)) if allowed else None
    if validator == "format" and error.validator_value == "bounded-duration":
        from stagewatch.durations import MAX_TEXT

        return f"{where}: {wording.quote(error.instance)} is longer than any window or delay stagewatch plans", f"at most {MAX_TEXT}"
    if validator == "pattern":
        return f"{where}: {wording.quote(error.instance)} has the wrong form", error.schema.get("description") or (
            f"text matching {error.validator_value}"
        )
    if validator == "type":
        return f"{where}: {wording.quote(error.instance)} is the wrong type", f"{error.validator_value}"
    return f"{where}: {wording.cap(error.message, 300)}", error.schema.get("description")


def schema_errors(data: Any, kind: str) -> list[Any]:
    """Every violation of schema ``kind`` in ``data`` (``jsonschema.ValidationError``), or none.

    The compiled validator decides; only when it finds a violation does the interpreted one list and word them.
    Should the two ever disagree, the compiled one's finding is kept, so no invalid document passes."""
    import fastjsonschema

    from stagewatch.resources import compiled, validator

    try:
        compiled(kind)(data)
    except fastjsonschema.JsonSchemaValueException as exc:
        errors = list(validator(kind).iter_errors(data))
        if errors:
            return errors
        import jsonschema

        return [jsonschema.ValidationError(exc.message, path=_pointer(exc.path), instance=exc.value,
                                           validator=str(exc.rule), validator_value=exc.rule_definition,
                                           schema=exc.definition if isinstance(exc.definition, dict) else {})]
    return []


def _pointer(path: Any) -> list[Any]:
    """fastjsonschema's path (``["data", "stages", 0]``) without its leading name."""
    return list(path or [])[1:]


def validate(doc: Document, kind: str) -> None:
    """Raise one StagewatchError for the first violation of schema ``kind`` in the file, with its YAML line, and
    list the others (each with its line, up to a limit)."""
    errors = schema_errors(doc.data, kind)[: 10 * wording.MAX_LISTED]
    if not errors:
        return
    import jsonschema

    problems = []  # (line, message, expected), in file order
    for error in errors:
        while error.context:  # descend into oneOf/anyOf to the most specific reason
            error = jsonschema.exceptions.best_match(error.context)
        message, expected = describe_error(error)
        where = list(error.absolute_path)
        extra = unknown_keys(error) if error.validator == "additionalProperties" else []
        problem = (doc.line_of(where + extra[:1]), message, expected)
        if problem not in problems:
            problems.append(problem)
    problems.sort(key=lambda p: p[0] or 0)
    (line, message, expected), rest = problems[0], problems[1:]
    message += wording.problem_list([f"{doc.path}:{n}: {m}" if n else f"{doc.path}: {m}" for n, m, _ in rest])
    raise StagewatchError(message, file=doc.path, line=line, expected=expected)


class _Dumper(_CachedResolve, getattr(yaml, "CSafeDumper", yaml.SafeDumper)):  # type: ignore[misc]
    """libyaml's emitter with PyYAML's safe representer. The emitter asks the resolver, for every scalar, whether
    its text would read back as another type (and so needs quotes); generated files repeat the same texts
    thousands of times, so the answers are kept per text (:class:`_CachedResolve`)."""

    def represent(self, data: Any) -> None:
        """PyYAML's ``represent``, with the nodes of plain data built in one pass (:mod:`stagewatch.yamlnodes`)."""
        self.serialize(yamlnodes.nodes(data, self.represent_data))
        self.represented_objects.clear()
        self.object_keeper.clear()
        self.alias_key = None


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
