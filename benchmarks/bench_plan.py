"""Benchmark: propose + lint + render (Markdown, then the HTML page) for generated pipelines of 10, 100 and 1,000 stages.

Prints seconds per step and per (stage + edge), so that growth with pipeline size can be read off. Not a test.
Run with `make bench` (or `python benchmarks/bench_plan.py [SIZES...]`).
"""

from __future__ import annotations

import random
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import yaml

from stagewatch import yamlio
from stagewatch.catalog import load_catalog
from stagewatch.lint import lint_file
from stagewatch.plan import compose, dump, load_plan
from stagewatch.render import render
from stagewatch.render_html import render as render_html
from stagewatch.spec import load_pipeline

KINDS = ["learned", "rule-based"]
MODALITIES = ["image", "text", "tabular", "events", "timeseries", "audio", "video"]
OUTPUTS = ["gate", "segments", "class", "attribute", "score", "value", "ranking", "text", "records"]
SERVING = ["online", "batch", "device"]


def generate(stages: int, seed: int = 1) -> dict:
    """A layered pipeline: each stage takes one or two upstream stages among the previous ten."""
    rng = random.Random(seed)
    out = []
    for i in range(stages):
        kind = "source" if i < max(1, stages // 20) else rng.choice(KINDS)
        stage = {"id": f"s{i:04d}", "kind": kind, "modality": rng.choice(MODALITIES),
                 "output": "records" if kind == "source" else rng.choice(OUTPUTS),
                 "serving": rng.choice(SERVING), "volume_per_hour": rng.choice([50, 500, 5000, 50000]),
                 "change_rate": rng.choice(["minutes", "hours", "days", "months"])}
        if kind != "source":
            window = list(range(max(0, i - 10), i))
            stage["upstream"] = [f"s{j:04d}" for j in sorted(rng.sample(window, min(len(window),
                                                                                     rng.choice([1, 2]))))]
        if kind == "learned" and rng.random() < 0.5:
            stage.update(labels="delayed", label_delay="2d")
        if stage["serving"] == "online":
            stage["latency_slo_ms"] = 100
        if stage["modality"] == "tabular":
            stage["inputs"] = [{"name": f"f{k}", "type": rng.choice(["numeric", "category"])} for k in range(3)]
        out.append(stage)
    return {"pipeline": f"bench-{stages}", "context": "business", "stages": out}


def run(stages: int, workdir: Path, memory: bool = False) -> dict:
    description = generate(stages)
    edges = sum(len(s.get("upstream", [])) for s in description["stages"])
    source = workdir / f"p{stages}.yaml"
    source.write_text(yaml.safe_dump(description, sort_keys=False))
    rules = load_catalog()
    if memory:
        tracemalloc.start()
    t0 = time.perf_counter()
    plan = compose(load_pipeline(str(source)), rules)
    plan_path = workdir / f"plan{stages}.yaml"
    yamlio.write_atomic(plan_path, dump(plan))
    t1 = time.perf_counter()
    findings = lint_file(str(plan_path))
    t2 = time.perf_counter()
    loaded, _ = load_plan(str(plan_path))
    render(loaded, workdir / f"out{stages}")
    t3 = time.perf_counter()
    render_html(loaded, workdir / f"out{stages}")
    t4 = time.perf_counter()
    peak = tracemalloc.get_traced_memory()[1] if memory else 0
    if memory:
        tracemalloc.stop()
    metrics = sum(len(s["metrics"]) for s in plan["stages"])
    return {"stages": stages, "edges": edges, "metrics": metrics, "propose_s": t1 - t0, "lint_s": t2 - t1,
            "render_s": t3 - t2, "html_s": t4 - t3, "total_s": t3 - t0, "peak_mib": peak / 2**20, "findings": len(findings)}


def main(argv: list[str]) -> None:
    memory = "--memory" in argv  # tracemalloc slows Python code several times: times are then not comparable
    sizes = [int(a) for a in argv if a != "--memory"] or [10, 100, 1000]
    print(f"{'stages':>7} {'edges':>6} {'metrics':>8} {'propose s':>10} {'lint s':>8} {'render s':>9} "
          f"{'total s':>8} {'ms/(stage+edge)':>16} {'peak MiB':>9} {'html s':>7}")
    with tempfile.TemporaryDirectory() as tmp:
        for size in sizes:
            r = run(size, Path(tmp), memory)
            per = 1000 * r["total_s"] / (r["stages"] + r["edges"])
            peak = f"{r['peak_mib']:.1f}" if memory else "-"
            print(f"{r['stages']:>7} {r['edges']:>6} {r['metrics']:>8} {r['propose_s']:>10.2f} {r['lint_s']:>8.2f} "
                  f"{r['render_s']:>9.2f} {r['total_s']:>8.2f} {per:>16.2f} {peak:>9} {r['html_s']:>7.2f}")
            if r["findings"]:
                print(f"        (lint found {r['findings']} finding(s) in the generated plan)")


if __name__ == "__main__":
    main(sys.argv[1:])
