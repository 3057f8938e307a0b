"""Reviewer comments survive a re-propose.

The plan is written by one deterministic dumper, so a re-propose cannot edit the old text in place. Instead each
comment in the old plan is anchored to a place that outlives the rewrite: the key path of the line it sits on
(an end-of-line comment) or of the next line with content (comments on their own lines), with list items named by
their ``id`` rather than their position. After the new plan is dumped, each comment goes back, verbatim, at its
path. A comment whose place is gone (a deleted metric) is kept at the end of the file under a marker line and
reported, so nothing a reviewer wrote is lost. When nothing changed the old file comes back byte for byte.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
import yaml

try:  # libyaml when present
    from yaml import CSafeLoader as _Loader
except ImportError:  # pragma: no cover - pure Python fallback
    from yaml import SafeLoader as _Loader  # type: ignore[assignment]

Path = tuple[str, ...]
ORPHANS = "# stagewatch: comments kept from the previous plan; the line they were on is gone"
_EOL = re.compile(r"\s+#.*$")


@dataclass
class Comments:
    above: dict[Path, list[str]] = field(default_factory=dict)  # own-line comment blocks, by the next line's path
    after: dict[Path, str] = field(default_factory=dict)  # end-of-line comments, verbatim with their spacing
    tail: list[str] = field(default_factory=list)  # comments after the last line with content

    def __bool__(self) -> bool:
        return bool(self.above or self.after or self.tail)


def _item_key(node: yaml.Node, index: int) -> str:
    if isinstance(node, yaml.MappingNode):
        for key, value in node.value:
            if key.value == "id" and isinstance(value, yaml.ScalarNode):
                return f"id={value.value}"
    return f"#{index}"


def paths_by_line(text: str) -> dict[int, Path]:
    """The key path that starts on each line (0-based), items of lists named by their id."""
    out: dict[int, Path] = {}

    def walk(node: yaml.Node, path: Path) -> None:
        if isinstance(node, yaml.MappingNode):
            for key, value in node.value:
                here = (*path, str(key.value))
                out.setdefault(key.start_mark.line, here)
                walk(value, here)
        elif isinstance(node, yaml.SequenceNode):
            for index, item in enumerate(node.value):
                here = (*path, _item_key(item, index))
                out.setdefault(item.start_mark.line, here)
                walk(item, here)

    root = yaml.compose(text, Loader=_Loader)
    if root is not None:
        walk(root, ())
    return out


def _content_ends(text: str) -> dict[int, int]:
    """For each line that holds YAML content, the column where its last token ends (lines inside a multi-line
    scalar count as content to their end)."""
    ends: dict[int, int] = {}
    for token in yaml.scan(text, Loader=_Loader):
        start, end = token.start_mark, token.end_mark
        if isinstance(token, (yaml.StreamStartToken, yaml.StreamEndToken)):
            continue
        for line in range(start.line, end.line):
            ends[line] = 10**9  # a scalar that continues on the next line: no comment can sit in it
        ends[end.line] = max(ends.get(end.line, 0), end.column)
    return ends


def extract(text: str, header: str = "") -> Comments:
    """Every comment of ``text`` anchored to a path (the lines of ``header`` are ours, not a reviewer's)."""
    found = Comments()
    if "#" not in text[len(header):]:
        return found
    lines = text.splitlines()
    skip = len(header.splitlines()) if header and text.startswith(header) else 0
    paths = paths_by_line(text)
    ends = _content_ends(text)
    pending: list[str] = []
    for i, line in enumerate(lines):
        if i < skip:
            continue
        if i not in ends:  # no content: a comment line or a blank line
            if line.strip().startswith("#"):
                pending.append(line)
            continue
        path = paths.get(i)
        if pending and path is not None:
            found.above.setdefault(path, []).extend(pending)
            pending = []
        rest = line[ends[i]:] if ends[i] < len(line) else ""
        if _EOL.fullmatch(rest) and path is not None:
            found.after[path] = rest
    found.tail = pending
    return found


def _renamed(path: Path, renames: dict[str, str]) -> Path:
    return tuple(f"id={renames[p[3:]]}" if p.startswith("id=") and p[3:] in renames else p for p in path)


def restore(text: str, comments: Comments, renames: dict[str, str] | None = None) -> tuple[str, list[str]]:
    """``text`` with ``comments`` put back at their paths; returns the text and the comments whose place is gone
    (kept at the end of the text)."""
    if not comments:
        return text, []
    renames = renames or {}
    line_of: dict[Path, int] = {}
    for number, path in paths_by_line(text).items():
        line_of.setdefault(path, number)
    above: dict[int, list[str]] = {}
    after: dict[int, str] = {}
    orphans: list[str] = []
    for path, block in comments.above.items():
        at = line_of.get(_renamed(path, renames))
        if at is None:
            orphans.extend(c.strip() for c in block)
        else:
            above.setdefault(at, []).extend(block)
    for path, comment in comments.after.items():
        at = line_of.get(_renamed(path, renames))
        if at is None:
            orphans.append("# " + comment.strip().lstrip("#").strip())
        else:
            after[at] = comment
    out: list[str] = []
    for i, line in enumerate(text.splitlines()):
        out.extend(above.get(i, []))
        out.append(line + after[i] if i in after and "#" not in line else line)
    out.extend(comments.tail)
    if orphans:
        out.append(ORPHANS)
        out.extend(orphans)
    return "\n".join(out) + "\n", orphans


def keep(old_text: str, new_text: str, header: str = "", renames: dict[str, str] | None = None
         ) -> tuple[str, list[str]]:
    """The new plan text with the old plan's comments; the comments that lost their place."""
    return restore(new_text, extract(old_text, header), renames)


def count(comments: Comments) -> int:
    return sum(len(b) for b in comments.above.values()) + len(comments.after) + len(comments.tail)

