"""One check per signal: metrics that read the same column of the same log with the same statistic are one check.

Several catalog rules can propose the same measurement at one observation point: a score stage's own output
drift, the drift of its declared output field and the producer side of each hand-off it feeds all read one column
of the producer's log with one statistic. Each would open its own ticket for one excursion. The plan keeps the
first (stage rules come before field and hand-off rules in match order) and lists in its ``serves`` key the
other roles it now plays, so coverage, lint and the hand-off table still see every side of every hand-off.

The two sides of a hand-off are different signals: the producer's log and the consumer's log are two observation
points, and a difference between them is what places a change on one side of the hand-off. Checks counted by the
service (``reads: {measured_in: service}``) say nothing about where they read, so they are never folded.
"""

from __future__ import annotations

import json
from typing import Any, Iterable

SEVERITY_ORDER = ("ticket", "page")


def signal_key(metric: dict[str, Any]) -> str | None:
    """What a metric measures and where: its log, its reads, its statistic and parameters (None: not foldable)."""
    reads = metric.get("reads")
    if not reads or reads.get("measured_in") == "service":
        return None
    owner = metric["id"].split(".", 1)[0]
    where = reads.get("stage", owner)
    what = {k: v for k, v in reads.items() if k != "stage"}
    return json.dumps([where, what, metric["statistic"], metric.get("params") or {}], sort_keys=True, default=str)


def _role(metric: dict[str, Any]) -> dict[str, Any]:
    role: dict[str, Any] = {"metric": metric["id"]}
    if metric.get("edge"):
        role["edge"] = dict(metric["edge"])
    if metric.get("field"):
        role["field"] = metric["field"]
    return role


def fold(drafts: dict[str, dict[str, Any]]) -> tuple[dict[str, dict[str, Any]], dict[str, str]]:
    """The drafts with one metric per signal, and for each folded metric id the id that now covers it.

    The kept metric takes the highest severity in its group and the union of what the group catches; the
    thresholds and window stay those of the kept metric's rule.
    """
    first: dict[str, str] = {}
    kept: dict[str, dict[str, Any]] = {}
    folded: dict[str, str] = {}
    for metric_id, draft in drafts.items():
        key = signal_key(draft)
        if key is None or key not in first:
            if key is not None:
                first[key] = metric_id
            kept[metric_id] = draft
            continue
        keeper = kept[first[key]]
        keeper.setdefault("serves", []).append(_role(draft))
        if SEVERITY_ORDER.index(draft["severity"]) > SEVERITY_ORDER.index(keeper["severity"]):
            keeper["severity"] = draft["severity"]
        keeper["catches"] = list(dict.fromkeys([*keeper["catches"], *draft["catches"]]))
        folded[metric_id] = first[key]
    return kept, folded


def handoff_sides(metric: dict[str, Any]) -> list[dict[str, Any]]:
    """Every hand-off side a metric checks: its own ``edge`` and those of the metrics folded into it."""
    sides = [metric["edge"]] if metric.get("edge") else []
    sides.extend(role["edge"] for role in metric.get("serves", []) if role.get("edge"))
    return sides


# Statistics that judge the whole shape of a numeric column. One of them per column of a log is enough: PSI and
# KS on one column alert together on one change of shape. A mean shift judges location only and may sit beside
# either.
DISTRIBUTION = ("psi", "ks")


def distribution_key(metric: dict[str, Any]) -> str | None:
    """The column and log a PSI or KS check judges the shape of, whatever its statistic (None: not such a check)."""
    if metric["statistic"] not in DISTRIBUTION:
        return None
    return signal_key({**metric, "statistic": "distribution", "params": {}})


def duplicates(metrics: Iterable[dict[str, Any]]) -> list[tuple[dict[str, Any], dict[str, Any]]]:
    """Pairs (first, later) of live metrics on one signal, or judging the shape of one column with PSI and KS, for
    lint."""
    seen: dict[str, dict[str, Any]] = {}
    out = []
    for metric in metrics:
        if metric.get("status") in ("rejected", "stale"):
            continue
        for key in dict.fromkeys(k for k in (signal_key(metric), distribution_key(metric)) if k is not None):
            if key in seen:
                out.append((seen[key], metric))
                break
            seen[key] = metric
    return out


def on_handoff(metrics: Iterable[dict[str, Any]], up: str, down: str, side: str) -> list[dict[str, Any]]:
    """The metrics that check one side of the hand-off ``up -> down``, whether born there or folded in."""
    return [m for m in metrics
            if any(e["from"] == up and e["to"] == down and e["side"] == side for e in handoff_sides(m))]
