"""Escaping by construction: one helper per place free text lands, so that what a person typed stays text.

Every writer sends free text (descriptions, owners, notes, measures, field names) through the helper for its target:

* :func:`markdown_text` and :func:`markdown_cell` backslash-escape the ASCII punctuation that can open Markdown
  syntax (CommonMark defines any ASCII punctuation after a backslash as literal): no heading, fence, list, link,
  image, emphasis, raw HTML or table column can start inside the text, whatever it holds.
* :func:`mermaid_label` turns every character Mermaid gives meaning to into its entity code.
* :func:`go_template_literal` is for Prometheus label values and annotations, which Prometheus expands as Go
  templates: each ``{`` becomes the action ``{{ "{" }}``, which prints a brace, so no action can open from the text.
* :func:`visible` shows control, format (bidi, zero-width) and other invisible characters as ``\\u202e`` escapes,
  for the terminal and for review documents.
"""

from __future__ import annotations

import re
import string
import unicodedata
from typing import Any

_PUNCTUATION = set(string.punctuation)
_INVISIBLE = ("Cc", "Cf", "Co", "Cs", "Cn", "Zl", "Zp")


def _plain(value: Any) -> str:
    return "" if value is None else str(value)


def visible(value: Any, keep: str = "") -> str:
    """``value`` with every control, bidi, zero-width or unassigned character shown as an escape.

    >>> visible("ok\\u202etxt.exe\\x1b[31m")
    'ok\\\\u202etxt.exe\\\\x1b[31m'
    """
    out = []
    for ch in _plain(value):
        if ch in keep or unicodedata.category(ch) not in _INVISIBLE:
            out.append(ch)
        elif ord(ch) < 0x100:
            out.append(f"\\x{ord(ch):02x}")
        elif ord(ch) < 0x10000:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(f"\\U{ord(ch):08x}")
    return "".join(out)


def terminal(value: Any) -> str:
    """Text for the terminal: lines kept, everything else invisible (escape codes, bidi overrides) escaped."""
    return visible(value, keep="\n")


def _one_line(value: Any) -> str:
    return re.sub(r"\s+", " ", visible(_plain(value), keep="\t\n\r\x0b\x0c")).strip()


# Characters that open Markdown syntax anywhere in a line (CommonMark plus GitHub's strikethrough and math).
_MARKDOWN_ANYWHERE = set("\\`*_[]<>|#~&!${}")


def markdown_text(value: Any) -> str:
    """Free text inside a Markdown paragraph, on one line, inert: ``# x`` stays ``# x``, ``<b>`` stays ``<b>``.

    CommonMark makes any ASCII punctuation after a backslash literal. Escaped are: every character that opens
    syntax anywhere in a line; the first character, if punctuation (lists, quotes, thematic breaks, setext
    underlines); a leading ``12.`` or ``12)`` (ordered lists); and ``://`` and ``www.``, which GitHub turns into
    links without any brackets.

    >>> markdown_text("# APPROVED [x](javascript:alert(1)) <img src=x>")
    '\\\\# APPROVED \\\\[x\\\\](javascript:alert(1)) \\\\<img src=x\\\\>'
    """
    text = _one_line(value)
    out = ["\\" + ch if ch in _MARKDOWN_ANYWHERE else ch for ch in text]
    if text and text[0] in _PUNCTUATION and not out[0].startswith("\\"):
        out[0] = "\\" + text[0]
    lead = re.match(r"\d+[.)]", text)
    if lead:
        out[lead.end() - 1] = "\\" + text[lead.end() - 1]
    for match in re.finditer(r"(?i):(?=//)|(?<=www)\.", text):
        out[match.start()] = "\\" + text[match.start()]
    return "".join(out)


def markdown_cell(value: Any) -> str:
    """Free text inside one table cell: the same as :func:`markdown_text` (a ``|`` is escaped with the rest)."""
    return markdown_text(value)


def markdown_code(value: Any) -> str:
    """An identifier shown as code: a code span fenced with more backticks than the text holds."""
    text = _one_line(value)
    run = max((len(m) for m in re.findall(r"`+", text)), default=0)
    fence = "`" * (run + 1)
    pad = " " if text.startswith("`") or text.endswith("`") else ""
    return f"{fence}{pad}{text}{pad}{fence}".replace("|", "\\|")


_MERMAID = {"#": "#35;", '"': "#quot;", "<": "#lt;", ">": "#gt;", "[": "#91;", "]": "#93;", "{": "#123;",
            "}": "#125;", "|": "#124;", "`": "#96;", "(": "#40;", ")": "#41;", "%": "#37;", ";": "#59;",
            "&": "#38;", "\\": "#92;", "-": "#45;"}


def mermaid_label(value: Any) -> str:
    """A label for use inside ``["..."]``: every character Mermaid reads as syntax becomes an entity code."""
    return "".join(_MERMAID.get(ch, ch) for ch in _one_line(value))


def matcher_value(value: Any) -> str:
    r"""A value inside the double quotes of an Alertmanager (or PromQL) matcher: backslash, quote and newline
    escaped as the matcher grammar reads them.

    >>> print(matcher_value('team "a"'))
    team \"a\"
    """
    return str(value).replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def go_template_literal(value: Any) -> str:
    """Text that a Go template (Prometheus labels and annotations) prints back exactly.

    Only ``{{`` opens an action in Go's text/template, and every ``{`` becomes an action that prints one, so the
    result holds no ``{`` outside an action of ours.

    >>> go_template_literal("{{ $value }}")
    '{{ "{" }}{{ "{" }} $value }}'
    """
    return "".join('{{ "{" }}' if ch == "{" else ch for ch in _plain(value))
