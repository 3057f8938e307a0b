"""Plain data (mappings, lists, text, numbers, booleans, null) to YAML nodes, the way PyYAML's safe representer
builds them for our dumper, in one tight pass.

PyYAML's representer is general: per value it asks whether the object was seen before (to write an anchor),
looks its type up among the registered representers, and builds the node. Generated files (a plan, rule files)
hold millions of plain values and no shared objects, so this pass builds the same nodes directly and hands
anything else back: an object met twice (an anchor and alias in PyYAML's output) makes the caller fall back to
PyYAML's own representer for the whole document, and a value of another type goes to the representer it has.
The output is byte-identical to PyYAML's; ``tests/test_yamlio.py`` checks it on drawn documents.
"""

from __future__ import annotations

from typing import Any, Callable

from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

_STR = "tag:yaml.org,2002:str"
_INT = "tag:yaml.org,2002:int"
_BOOL = "tag:yaml.org,2002:bool"
_NULL = "tag:yaml.org,2002:null"
_FLOAT = "tag:yaml.org,2002:float"
_INF = float("inf")
_MAP = "tag:yaml.org,2002:map"
_SEQ = "tag:yaml.org,2002:seq"


class Shared(Exception):
    """A mapping or list appears twice in the data: PyYAML writes it once with an anchor, then as aliases."""


def nodes(data: Any, other: Callable[[Any], Node]) -> Node:
    """The node tree of ``data`` for a block-style dump (``default_flow_style=False``), texts with a line break
    as literal blocks; ``other`` represents any type not listed here, as PyYAML would."""
    seen: set[int] = set()

    def node(value: Any) -> Node:
        kind = type(value)
        if kind is str:
            return ScalarNode(_STR, value, style="|" if "\n" in value else None)
        if kind is dict:
            if id(value) in seen:
                raise Shared
            seen.add(id(value))
            return MappingNode(_MAP, [(node(k), node(v)) for k, v in value.items()], flow_style=False)
        if kind is list:
            if id(value) in seen:
                raise Shared
            seen.add(id(value))
            return SequenceNode(_SEQ, [node(v) for v in value], flow_style=False)
        if kind is bool:
            return ScalarNode(_BOOL, "true" if value else "false")
        if kind is float:
            return ScalarNode(_FLOAT, _float_text(value))
        if kind is int:
            return ScalarNode(_INT, str(value))
        if value is None:
            return ScalarNode(_NULL, "null")
        return other(value)

    return node(data)


def _float_text(value: float) -> str:
    """PyYAML's ``SafeRepresenter.represent_float``: repr in lower case, with '.0' added to an exponent form
    that has no decimal point (1e17 is not a YAML 1.1 float, 1.0e17 is)."""
    if value != value:
        return ".nan"
    if value == _INF:
        return ".inf"
    if value == -_INF:
        return "-.inf"
    text = repr(value).lower()
    if "." not in text and "e" in text:
        text = text.replace("e", ".0e", 1)
    return text
