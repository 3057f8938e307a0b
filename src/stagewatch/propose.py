"""`propose`: pipeline description in, plan out, merged with the plan already on disk."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from stagewatch import comments, renames
from stagewatch import plan as plan_mod
from stagewatch import spec, yamlio
from stagewatch.catalog import load_catalog
from stagewatch.safewrite import STDOUT, Snapshot, resolve_target


@dataclass
class MergeReport:
    path: str
    metrics: int
    added: list[str] = field(default_factory=list)
    kept_edits: list[str] = field(default_factory=list)
    refreshed: list[str] = field(default_factory=list)
    stale: list[str] = field(default_factory=list)
    flagged: list[str] = field(default_factory=list)
    comments_kept: int = 0
    comments_moved: list[str] = field(default_factory=list)
    renamed: dict[str, str] = field(default_factory=dict)
    expected_false_pages: float = 0.0
    budget: float = 1.0
    from_data_kept: int = 0  # checks whose thresholds from data came from the plan itself (no --baseline given)

    def lines(self) -> list[str]:
        out = [f"wrote {self.path}: {self.metrics} metrics"]
        if self.added:
            out.append(f"  {len(self.added)} new")
        if self.kept_edits:
            out.append(f"  {len(self.kept_edits)} with reviewer edits kept as written")
        if self.refreshed:
            out.append(f"  {len(self.refreshed)} untouched and refreshed")
        if self.stale:
            out.append(f"  {len(self.stale)} stale (their rule no longer applies): " + ", ".join(self.stale[:5])
                       + (" ..." if len(self.stale) > 5 else ""))
        if self.renamed:
            out.append(f"  {len(self.renamed)} renamed after a stage or field rename (renamed_from), edits kept: "
                       + ", ".join(f"{a} -> {b}" for a, b in list(self.renamed.items())[:5])
                       + (" ..." if len(self.renamed) > 5 else ""))
        if self.comments_kept:
            out.append(f"  {self.comments_kept} reviewer comment(s) kept in place")
        if self.comments_moved:
            out.append(f"  warning: {len(self.comments_moved)} comment(s) lost their line (its metric or key is "
                       "gone) and are kept at the end of the plan")
        if self.from_data_kept:
            out.append(f"  {self.from_data_kept} check(s) keep the thresholds their baseline gave (as the plan "
                       "recorded them); pass --baseline DIR to fit them to new reference data")
        if self.flagged:
            out.append(f"  {len(self.flagged)} flagged for review (see 'review:' in the plan)")
        out.append(f"  expected false pages per week from sampling noise alone, under independent items: "
                   f"{small(self.expected_false_pages)} (budget {self.budget:g})")
        return out


def small(x: float) -> str:
    """Tiny expected counts read as "< 1e-6" rather than 5e-21; three significant figures otherwise."""
    return "< 1e-6" if 0 < x < 1e-6 else f"{x:.3g}"


def _ids(plan: dict[str, Any] | None) -> dict[str, dict[str, Any]]:
    if not plan:
        return {}
    return {m["id"]: m for m in plan_mod.all_metrics(plan) + plan.get("retired_metrics", [])}


def report(path: str, before: dict[str, Any] | None, after: dict[str, Any],
           moved: dict[str, str] | None = None) -> MergeReport:
    old, new = _ids(before), _ids(after)
    old = {(moved or {}).get(k, k): v for k, v in old.items()}  # a renamed stage's metrics are not new
    rep = MergeReport(path=path, metrics=len(plan_mod.all_metrics(after)),
                      expected_false_pages=after["budget"]["expected_false_pages_per_week"] or 0.0,
                      budget=after["false_alarms_per_week"])
    for metric_id, metric in new.items():
        if metric.get("review"):
            rep.flagged.append(metric_id)
        if metric_id not in old:
            rep.added.append(metric_id)
        elif metric.get("status") == "stale":
            rep.stale.append(metric_id)
        elif "fingerprint" not in metric:
            rep.kept_edits.append(metric_id)
        else:
            rep.refreshed.append(metric_id)
    if before is None:
        rep.added = []  # a first plan: everything is new, saying so adds nothing
    return rep


def propose(pipeline_path: str, plan_path: str | None, catalog_dir: str | None = None,
            baseline_dir: str | None = None) -> tuple[str, MergeReport | None]:
    """Compose (and merge) the plan; returns its text and, when written to a file, what changed."""
    target = plan_path if plan_path and plan_path != STDOUT else None
    if target:  # refuse a bad target before the work, not after it
        resolve_target(target, [pipeline_path])
    pipeline = spec.load_pipeline(pipeline_path)
    rules = load_catalog(catalog_dir)
    existing = None
    snapshot = None
    old_text = ""
    if target:
        snapshot = Snapshot.take(target)
        if snapshot.digest is not None:
            existing, doc = plan_mod.load_plan(target)
            snapshot = doc.snapshot()  # the bytes the merge starts from
            old_text = doc.text
    found = None
    if baseline_dir:
        from stagewatch.data.baseline import load_thresholds

        found = load_thresholds(baseline_dir, pipeline.name)
    composed = plan_mod.compose(pipeline, rules, existing, found)
    text = plan_mod.dump(composed)
    if not target:
        return text, None
    moved_ids = renames.metric_ids(existing, pipeline)
    kept = comments.extract(old_text, plan_mod.HEADER) if old_text else comments.Comments()
    text, moved = comments.restore(text, kept, moved_ids)
    # Replaced only if nobody changed the plan while it was merged (another propose, an editor's save).
    yamlio.write_atomic(target, text, inputs=[pipeline_path], expected=snapshot)
    rep = report(target, existing, composed, moved_ids)
    rep.comments_kept = comments.count(kept) - len(moved)
    rep.comments_moved = moved
    rep.renamed = {a: b for a, b in moved_ids.items() if "." in a}
    if found is None:
        rep.from_data_kept = sum(1 for m in plan_mod.all_metrics(composed)
                                 if "fingerprint" in m and (m.get("sizing") or {}).get("from_data"))
    return text, rep
