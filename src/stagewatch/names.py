"""How an id is spelled in each output, and the check that two ids stay distinct in all of them.

Stage ids may hold ``_`` and ``-``, field names ``_``; outputs are stricter: a Mermaid node id keeps letters, digits
and ``_``, an alert name is CamelCase without separators, an Alertmanager receiver keeps ``[A-Za-z0-9_.-]``. Two ids
that are different in the plan but the same in one of these outputs would merge two stages in the diagram or two
alerts in Prometheus, so they are refused at load (:func:`first_collision`).
"""

from __future__ import annotations

import hashlib
import re
from typing import Callable, Iterable, TypeVar

T = TypeVar("T")


def mermaid_id(value: str) -> str:
    """The Mermaid node id of a stage: ``load-cell`` -> ``s_load_cell``."""
    return "s_" + re.sub(r"[^A-Za-z0-9_]", "_", value)


def alert_name(metric_id: str) -> str:
    """CamelCase alert name from a metric id: ``frame_gate.output.pass_rate`` -> ``FrameGateOutputPassRate``."""
    return "".join(part[:1].upper() + part[1:] for part in re.split(r"[^A-Za-z0-9]+", metric_id) if part)


# The forms a stage id or a field name takes in the outputs, by the output's name.
ID_FORMS: dict[str, Callable[[str], str]] = {"the Mermaid diagram": mermaid_id, "alert names": alert_name}


def first_collision(items: Iterable[tuple[str, T]]) -> tuple[tuple[str, T], tuple[str, T], str, str] | None:
    """The first two distinct ids among ``(id, where)`` pairs that share a form in some output:
    ``((id, where), (other_id, other_where), output, shared form)``, or None."""
    seen: dict[tuple[str, str], tuple[str, T]] = {}
    for ident, where in items:
        for output, form in ID_FORMS.items():
            key = (output, form(ident))
            first = seen.get(key)
            if first is not None and first[0] != ident:
                return first, (ident, where), output, key[1]
            seen.setdefault(key, (ident, where))
    return None


def receivers(owners: Iterable[str], reserved: Iterable[str] = ()) -> dict[str, str]:
    """A distinct Alertmanager receiver base name per owner: ``team a`` -> ``team-a``; when two owners (or an
    owner and a ``reserved`` name) normalise alike, each gets a short hash of its exact text appended."""
    ordered = sorted(set(owners))
    base = {o: re.sub(r"[^A-Za-z0-9_.-]+", "-", o).strip("-") or "team" for o in ordered}
    taken = set(reserved)
    counts: dict[str, int] = {}
    for name in base.values():
        counts[name] = counts.get(name, 0) + 1
    out = {}
    for owner in ordered:
        name = base[owner]
        if counts[name] > 1 or name in taken:
            name = f"{name}-{hashlib.sha256(owner.encode()).hexdigest()[:8]}"
        out[owner] = name
    return out
