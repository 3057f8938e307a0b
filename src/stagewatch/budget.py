"""The false-alarm budget: expected false pages and tickets per week, split evenly over the groups the description
fixes (each stage, and the whole pipeline), then over each group's checks (a Bonferroni split of the expected
count), each share rounded down to 1, 2 or 5 times a power of ten."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from stagewatch import stats


def ladder_down(x: float) -> float:
    """``x`` rounded down to 1, 2 or 5 times a power of ten: a share that moves only when a count moves a lot."""
    if x <= 0 or not math.isfinite(x):
        return x
    power = 10 ** math.floor(math.log10(x))
    step = max(s for s in (1, 2, 5, 10) if s * power <= x * (1 + 1e-12))
    return float(f"{step * power:.6g}")


@dataclass
class Budget:
    """Expected false alarms per week allowed for one page check and for one ticket alert.

    With ``per_owner`` (the plan's way), the budget is split evenly over the groups the description fixes (each
    stage, and the whole pipeline), then evenly over the checks of each group, and each share is rounded down to
    1, 2 or 5 times a power of ten. So a change inside one stage (a rejected check, a new volume) moves the shares
    of that stage only, and a small change moves none; the sum of the shares never exceeds the budget.
    """

    pages_per_week: float
    tickets_per_week: float
    page_checks: int
    ticket_alerts: int
    groups: int = 1
    per_owner: dict[str, tuple[int, int]] | None = None  # owner -> (page checks, ticket alerts)

    @property
    def page_share(self) -> float:
        return self.pages_per_week / max(self.page_checks, 1)

    @property
    def ticket_share(self) -> float:
        return self.tickets_per_week / max(self.ticket_alerts, 1)

    def share(self, metric: dict[str, Any], kind: str) -> float:
        """The expected false alarms per week this metric's ``kind`` ("page" or "ticket") alert may spend."""
        if self.per_owner is None:
            return self.page_share if kind == "page" else self.ticket_share
        pages, tickets = self.per_owner.get(owner_of(metric), (0, 0))
        if kind == "page":
            return ladder_down(self.pages_per_week / self.groups / max(pages, 1))
        return ladder_down(self.tickets_per_week / self.groups / max(tickets, 1))


def owner_of(metric: dict[str, Any]) -> str:
    return str(metric["id"]).split(".", 1)[0]


def is_statistical(metric: dict[str, Any]) -> bool:
    return metric["statistic"] in stats.STATISTICS


def make_budget(metrics: list[dict[str, Any]], pages_per_week: float, tickets_per_week: float,
                owners: list[str] | None = None) -> Budget:
    """Count the checks that share each budget: page-severity criticals, and every ticket-level alert; with
    ``owners`` (the stage ids and "pipeline"), per owner, for the split by group."""
    page = ticket = 0
    per_owner: dict[str, list[int]] = {o: [0, 0] for o in owners or []}
    for m in metrics:
        if not is_statistical(m) or m.get("status") in ("rejected", "stale"):
            continue
        counts = per_owner.setdefault(owner_of(m), [0, 0])
        if m.get("critical") is not None:
            if m["severity"] == "page":
                page += 1
                counts[0] += 1
            else:
                ticket += 1
                counts[1] += 1
        if m.get("warn") is not None:
            ticket += 1
            counts[1] += 1
    if owners is None:
        return Budget(pages_per_week, tickets_per_week, page, ticket)
    return Budget(pages_per_week, tickets_per_week, page, ticket, groups=len(owners),
                  per_owner={o: (c[0], c[1]) for o, c in per_owner.items()})
