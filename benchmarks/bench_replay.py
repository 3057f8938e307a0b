"""Benchmark: replay of five weeks at a 1-minute cadence for the 7-stage demo plan (about 0.8 to 1 million rows
per stage), beside a naive loop that runs `check` once per evaluation time.

Prints seconds, rows per second and peak memory (resident set of the process that ran the step). The naive loop is
timed on a sample of evaluation times and extrapolated to all of them: running it in full would take hours. Not
a test. Run with `make bench` (or `python benchmarks/bench_replay.py [SAMPLE]`).
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

STEP = r'''
import json, resource, sys, time
from stagewatch.data.check import run_check
from stagewatch.data.replay import run_replay
from stagewatch.data.sources import format_time
args = json.loads(sys.argv[1])
t0 = time.perf_counter()
if args["kind"] == "replay":
    result = run_replay(args["plan"], args["baseline"], args["data"], start=args["start"], end=args["end"], cadence="1m")
    evaluations = sum(c.evaluations for c in result.checks)
else:
    evaluations = 0
    for at in args["times"]:
        run_check(args["plan"], args["baseline"], args["data"], at=format_time(at))
        evaluations += 1
seconds = time.perf_counter() - t0
print(json.dumps({"seconds": seconds, "evaluations": evaluations,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
'''


def _run(args: dict) -> dict:
    out = subprocess.run([sys.executable, "-c", STEP, json.dumps(args)], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(sample: int = 12) -> None:
    import duckdb
    import yaml

    from stagewatch.cli import main as cli
    from stagewatch.data.sources import format_time
    from stagewatch.demo import DEMO
    from stagewatch.demo_logs import DAYS, REFERENCE_END, START, write_logs

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        (work / "pipeline.yaml").write_text(DEMO.read_text())
        plan = work / "plan.yaml"
        cli(["propose", str(work / "pipeline.yaml"), "-o", str(plan)])
        data = write_logs(yaml.safe_load(plan.read_text()), str(work / "logs"))
        rows = sum(duckdb.connect().execute(f"SELECT count(*) FROM '{p}'").fetchone()[0] for p in data.values())
        args = [x for s, p in data.items() for x in ("--data", f"{s}={p}")]
        cli(["calibrate", str(plan), *args, "--to", format_time(REFERENCE_END), "-o", str(work / "base")])
        common = {"plan": str(plan), "baseline": str(work / "base"), "data": data}
        end = START + DAYS * 86400
        fast = _run({**common, "kind": "replay", "start": format_time(START), "end": format_time(end)})
        minutes = int((end - START) // 60)
        times = [START + 86400 + (end - START - 86400) * (i + 0.5) / sample for i in range(sample)]
        naive = _run({**common, "kind": "naive", "times": times})
        per_check_run = naive["seconds"] / sample
        naive_total = per_check_run * minutes
        print(f"data: 7 stages, {rows:,} rows, {DAYS} days; replay at a 1-minute cadence: {minutes:,} evaluation times")
        print(f"{'step':<40} {'seconds':>10} {'rows/s':>12} {'peak MB':>9}")
        print(f"{'replay (one scan per stage)':<40} {fast['seconds']:>10.1f} {rows / fast['seconds']:>12,.0f} "
              f"{fast['peak_mb']:>9.0f}")
        print(f"{'naive: check per evaluation time':<40} {naive_total:>10,.0f} {rows * minutes / naive_total:>12,.0f} "
              f"{naive['peak_mb']:>9.0f}   (extrapolated from {sample} runs, {per_check_run:.2f} s each)")
        print(f"replay is {naive_total / fast['seconds']:,.0f}x faster than the naive loop; "
              f"{fast['evaluations']:,} check evaluations in all")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:]))
