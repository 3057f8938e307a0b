"""Benchmark: every planning command as users pay for it, one process per command, start-up included.

For the bundled demo and for generated pipelines (default 1,000 stages) it times, each as a separate
`stagewatch` process: propose (a new plan), propose again (the re-propose of an existing plan), lint, render,
explain, export --to prometheus and export --to checks; and `stagewatch --version` and `--help`. Beside each
figure it prints the ratio to the plan's floor: a process that only loads the plan with PyYAML's C loader and
dumps it again with the C dumper (what any tool that reads and writes that plan pays), timed in turn with each
command so that each ratio is taken pair by pair. The planning commands run without Python's cycle collector
(see cli.py), so a second ratio is to the same floor with the collector off. It ends with the size of
`alertmanager.yml` for chains of 1,000 and 2,000 stages, which must grow linearly. Not a test: it prints figures.

Run with `make bench`, or `python benchmarks/bench_plan.py [--runs N] [demo] [SIZES...]`; each figure is the
median of N runs (default: 3 for the demo and `--version`/`--help`, 1 for a generated pipeline, whose commands
take tens of seconds each).
"""

from __future__ import annotations

import math
import random
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

KINDS = ["learned", "rule-based"]
MODALITIES = ["image", "text", "tabular", "events", "timeseries", "audio", "video"]
OUTPUTS = ["gate", "segments", "class", "attribute", "score", "value", "ranking", "text", "records"]
SERVING = ["online", "batch", "device"]
BIN = Path(sys.executable).parent
STAGEWATCH = str(BIN / "stagewatch")
FLOOR = ("import sys, yaml\n"
         "with open(sys.argv[1], encoding='utf-8') as f:\n"
         "    data = yaml.load(f.read(), Loader=yaml.CSafeLoader)\n"
         "text = yaml.dump(data, Dumper=yaml.CSafeDumper, sort_keys=False, default_flow_style=False, width=110,\n"
         "                 allow_unicode=True)\n")


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


def chain(stages: int) -> dict:
    """A plan skeleton for a chain of stages: what the Alertmanager configuration is built from."""
    return {"pipeline": f"chain-{stages}", "stages": [
        {"id": f"c{i:05d}", "upstream": [f"c{i - 1:05d}"] if i else [], "metrics": []} for i in range(stages)]}


def timed(argv: list[str], runs: int, setup: list[str] | None = None) -> float:
    """Median wall seconds of ``argv`` as a separate process (``setup`` runs untimed before each run)."""
    times = []
    for _ in range(runs):
        if setup:
            subprocess.run(setup, check=True, stdout=subprocess.DEVNULL)
        t0 = time.perf_counter()
        done = subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        times.append(time.perf_counter() - t0)
        if done.returncode not in (0, 1):  # 1: lint findings
            raise SystemExit(f"{' '.join(argv)} failed ({done.returncode}): {done.stderr.decode()[-2000:]}")
    return statistics.median(times)


def first_metric(plan_path: Path) -> str:
    plan = yaml.load(plan_path.read_text(encoding="utf-8"), Loader=yaml.CSafeLoader)
    return next(m["id"] for s in plan["stages"] for m in s.get("metrics", []))


def paired(argv: list[str], floor: list[str], runs: int, setup: list[str] | None = None) -> tuple[float, float]:
    """Median seconds of ``argv`` and the median of its ratio to ``floor``, timed in turn (floor, command, floor,
    command ...), so that a machine whose speed drifts moves both sides of each ratio alike."""
    seconds, ratios = [], []
    for _ in range(runs):
        base = timed(floor, 1)
        took = timed(argv, 1, setup)
        seconds.append(took)
        ratios.append(took / base)
    return statistics.median(seconds), statistics.median(ratios)


def bench(name: str, description: Path, work: Path, runs: int) -> list[tuple[str, float, float, float]]:
    plan = work / f"{name}.plan.yaml"
    first = [STAGEWATCH, "propose", str(description), "-o", str(plan)]
    remove = [sys.executable, "-c", f"import os; os.path.exists({str(plan)!r}) and os.remove({str(plan)!r})"]
    subprocess.run(first, check=True, stdout=subprocess.DEVNULL)  # the plan the floor reads
    floor = [sys.executable, "-c", FLOOR, str(plan)]
    floor_off = [sys.executable, "-c", "import gc; gc.disable()\n" + FLOOR, str(plan)]
    commands = [
        ("propose (new plan)", first, remove),
        ("propose (re-propose)", first, None),
        ("lint", [STAGEWATCH, "lint", str(plan)], None),
        ("render", [STAGEWATCH, "render", str(plan), "-o", str(work / f"{name}.render")], None),
        ("render --format html", [STAGEWATCH, "render", str(plan), "-o", str(work / f"{name}.html"), "--format",
                                  "html"], None),
        ("explain", [STAGEWATCH, "explain", str(plan), first_metric(plan)], None),
        ("export --to prometheus", [STAGEWATCH, "export", str(plan), "--to", "prometheus", "-o",
                                    str(work / f"{name}.prom")], None),
        ("export --to checks", [STAGEWATCH, "export", str(plan), "--to", "checks", "-o",
                                str(work / f"{name}.checks.json")], None),
    ]
    rows = []
    for step, argv, setup in commands:
        seconds, ratio = paired(argv, floor, runs, setup)
        _, ratio_off = paired(argv, floor_off, runs, setup)
        rows.append((step, seconds, ratio, ratio_off))
    size = plan.stat().st_size / 2**20
    return [(f"floor: load + dump of the plan ({size:.1f} MiB)", timed(floor, runs), 1.0, math.nan),
            ("floor with the cycle collector off", timed(floor_off, runs), math.nan, 1.0)] + rows


def chain_sizes(sizes: tuple[int, ...] = (1000, 2000)) -> list[tuple[int, int]]:
    from stagewatch import yamlio
    from stagewatch.exporters.alertmanager import AM_HEADER, alertmanager_config

    return [(n, len((AM_HEADER + yamlio.dump(alertmanager_config(chain(n), []))).encode())) for n in sizes]


def _ratio(x: float) -> str:
    return "" if math.isnan(x) else f"{x:.2f}"


def main(argv: list[str]) -> None:
    runs: int | None = None
    if "--runs" in argv:
        at = argv.index("--runs")
        runs = int(argv[at + 1])
        argv = argv[:at] + argv[at + 2:]
    targets = argv or ["demo", "1000"]
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        print("each figure: median wall seconds, one process per command, start-up included")
        quick = max(runs or 3, 5)
        start_up = [("stagewatch --version", timed([STAGEWATCH, "--version"], quick)),
                    ("stagewatch --help", timed([STAGEWATCH, "--help"], quick)),
                    ("bare interpreter", timed([sys.executable, "-c", "pass"], quick))]
        for step, seconds in start_up:
            print(f"  {step:<48} {seconds:>8.3f} s")
        for target in targets:
            if target == "demo":
                from stagewatch.demo import DEMO

                description = work / "demo.yaml"
                shutil.copyfile(DEMO, description)
                title = f"demo ({DEMO.name})"
            else:
                size = int(target)
                pipeline = generate(size)
                edges = sum(len(s.get("upstream", [])) for s in pipeline["stages"])
                description = work / f"p{size}.yaml"
                description.write_text(yaml.safe_dump(pipeline, sort_keys=False))
                title = f"generated, {size:,} stages, {edges:,} edges"
            count = runs or (3 if target == "demo" else 1)
            print(f"\n{title}, median of {count} run(s):")
            print(f"  {'step':<48} {'seconds':>10} {'x floor':>8} {'x floor, collector off':>23}")
            for step, seconds, ratio, ratio_off in bench(target, description, work, count):
                print(f"  {step:<48} {seconds:>10.3f} {_ratio(ratio):>8} {_ratio(ratio_off):>23}")
        print("\nalertmanager.yml for a chain of stages:")
        sizes = chain_sizes()
        for n, size in sizes:
            print(f"  {n:>6,} stages  {size:>12,} bytes")
        print(f"  ratio {sizes[-1][0] // sizes[0][0]}x stages: {sizes[-1][1] / sizes[0][1]:.2f}x bytes")


if __name__ == "__main__":
    main(sys.argv[1:])
