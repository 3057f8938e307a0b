"""Plain data (mappings, lists, text, numbers, booleans, null) to YAML nodes, the way PyYAML's safe representer
builds them for our dumper, in one tight pass.

PyYAML's representer is general: per value it asks whether the object was seen before, looks its type up among
the registered representers, and builds the node. Generated files (a plan, rule files, rule tests) hold millions
of plain values, so this pass builds the same nodes directly (a mapping or list met twice gives one node, which
PyYAML's serializer writes once with an anchor) and hands a value of any other type to the representer it has.
The output is byte-identical to PyYAML's; ``tests/test_fast_paths.py`` checks it on drawn documents.
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


def nodes(data: Any, other: Callable[[Any], Node]) -> Node:
    """The node tree of ``data`` for a block-style dump (``default_flow_style=False``), texts with a line break
    as literal blocks; ``other`` represents any type not listed here, as PyYAML would.

    A mapping or list met again gives the node it gave the first time, as in PyYAML's representer; the
    serializer then writes it once with an anchor and refers to it by alias. (A plain recursive function, not a
    closure: a closure that calls itself is a reference cycle, and the planning commands run without the cycle
    collector, see cli.py.)
    """
    return _node(data, {}, other)


def _node(value: Any, made: dict[int, Node], other: Callable[[Any], Node]) -> Node:
    kind = type(value)
    if kind is str:
        return ScalarNode(_STR, value, style="|" if "\n" in value else None)
    if kind is dict or kind is list:
        known = made.get(id(value))
        if known is not None:
            return known
        if kind is dict:
            pairs: list[tuple[Node, Node]] = []
            made[id(value)] = MappingNode(_MAP, pairs, flow_style=False)
            pairs.extend((_node(k, made, other), _node(v, made, other)) for k, v in value.items())
        else:
            items: list[Node] = []
            made[id(value)] = SequenceNode(_SEQ, items, flow_style=False)
            items.extend(_node(v, made, other) for v in value)
        return made[id(value)]
    if kind is bool:
        return ScalarNode(_BOOL, "true" if value else "false")
    if kind is float:
        return ScalarNode(_FLOAT, _float_text(value))
    if kind is int:
        return ScalarNode(_INT, str(value))
    if value is None:
        return ScalarNode(_NULL, "null")
    return other(value)


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
