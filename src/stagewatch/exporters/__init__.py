"""Exporters: turn a plan into configuration that monitoring systems load.

Each exporter registers under the name ``--to`` takes and satisfies :class:`Exporter`: a function that writes its
files and returns one line per file written.
"""

from __future__ import annotations

from typing import Any, Protocol, Sequence

from stagewatch.plan import all_metrics, load_plan


class Exporter(Protocol):
    """Writes ``plan`` to ``target`` through :mod:`stagewatch.safewrite`, never over a file in ``inputs``; a
    directory of files is owned through :mod:`stagewatch.owned` (``force``: write over hand edits, keeping .bak)."""

    def __call__(self, plan: dict[str, Any], target: str, inputs: Sequence[str] = (),
                 force: bool = False) -> list[str]: ...


def _prometheus(plan: dict[str, Any], target: str, inputs: Sequence[str] = (), force: bool = False) -> list[str]:
    from stagewatch.exporters.prometheus import export_prometheus

    return export_prometheus(plan, target, inputs, force=force)


def _checks(plan: dict[str, Any], target: str, inputs: Sequence[str] = (), force: bool = False) -> list[str]:
    from stagewatch.exporters.checks import export_checks

    return export_checks(plan, target, inputs, force=force)


EXPORTERS: dict[str, Exporter] = {
    "prometheus": _prometheus,
    "checks": _checks,
}


def live_metrics(plan: dict[str, Any]) -> list[dict[str, Any]]:
    """The metrics an export carries: accepted or proposed, never rejected or stale."""
    return [m for m in all_metrics(plan) if m["status"] in ("accepted", "proposed")]


def export(plan_path: str, to: str, target: str, force: bool = False) -> list[str]:
    from stagewatch.errors import StagewatchError
    from stagewatch.lint import misordered

    plan, doc = load_plan(plan_path)
    blocking = misordered(doc)  # rules that would alert at the wrong level: refused before anything is written
    if blocking:
        first = blocking[0]
        more = "".join(f"\n  also {f}" for f in blocking[1:5])
        raise StagewatchError(f"{first.message}: the exported rules would alert at the wrong level; nothing was "
                              f"written{more}", file=plan_path, line=first.line,
                              expected="warn before critical in the check's direction (`stagewatch lint` lists it)")
    return EXPORTERS[to](plan, target, [plan_path], force=force)
