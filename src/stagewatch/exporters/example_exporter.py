#!/usr/bin/env python3
"""Example: a stage process emitting the series a stagewatch plan asks for, with prometheus_client.

It reads the ``instrumentation.json`` written next to it by ``stagewatch export --to prometheus``, serves every
family with steady, healthy values on ``--port``, and with ``--fault CHECK`` plays a fault on one check (a share
moves past its critical threshold, a distribution collapses onto one bin, errors burst ...). Real stages emit the
same families from their own code: create every check's counter series (every bin and category) at 0 at start,
increment ``stagewatch_check_items_total`` and ``stagewatch_check_matches_total`` as items pass a check, count
bins, observe latencies. PSI reference shares are smoothed: (count + 0.5) / (total + 0.5 x bins) per bin.

    pip install prometheus-client
    python example_exporter.py --port 9464 [--fault frame_gate.output.pass_rate]
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server

TICK_S = 0.2
PER_TICK = 100


def _short(name: str, kind: str) -> str:
    # prometheus_client adds _total to counters itself.
    return name[: -len("_total")] if kind == "counter" and name.endswith("_total") else name


def build(instrumentation: dict, registry: CollectorRegistry) -> dict:
    metrics = {}
    buckets = sorted({float(u["bucket_le"]) for f in instrumentation["families"] for u in f["uses"]
                      if "bucket_le" in u} | {0.005, 0.05, 0.5, 5.0})
    for fam in instrumentation["families"]:
        cls = {"counter": Counter, "gauge": Gauge, "histogram": Histogram}[fam["type"]]
        kwargs = {"buckets": buckets} if fam["type"] == "histogram" else {}
        metrics[fam["name"]] = cls(_short(fam["name"], fam["type"]), fam["help"], fam["labels"], registry=registry,
                                   **kwargs)
    _create_at_zero(instrumentation, metrics)
    return metrics


def _create_at_zero(instrumentation: dict, metrics: dict) -> None:
    """Create every counter series at 0 before the first item: every bin or category of a distribution check
    and every check counter. A series that first appears with its first item loses that item to increase(), and
    a bin that never appears would otherwise be missing from PSI instead of counting as empty."""
    pipeline = instrumentation["pipeline"]
    for fam in instrumentation["families"]:
        if fam["type"] != "counter" or "check" not in fam["labels"]:
            continue
        for use in fam["uses"]:
            labelled = {"pipeline": pipeline, "stage": use["stage"], "check": use["check"]}
            if "bin" in fam["labels"]:
                for b in range(int(use.get("bins", 10))):
                    metrics[fam["name"]].labels(**labelled, bin=str(b))
            else:
                metrics[fam["name"]].labels(**labelled)


def tick(instrumentation: dict, metrics: dict, fault: str | None, now: float) -> None:
    pipeline = instrumentation["pipeline"]
    checks = instrumentation["checks"]
    for fam in instrumentation["families"]:
        metric = metrics[fam["name"]]
        name = fam["name"]
        for use in fam["uses"]:
            check = use["check"]
            info = checks.get(check, {})
            faulty = check == fault
            base = {"pipeline": pipeline, "stage": use["stage"]}
            labelled = {**base, "check": check} if "check" in fam["labels"] else base
            critical = info.get("critical") or 0.0
            if name == "stagewatch_check_items_total":
                grow = 1 + 2 * critical if faulty and info.get("direction") == "above" else (
                    max(0.0, 1 - 2 * critical) if faulty else 1)
                metric.labels(**labelled).inc(PER_TICK * (grow if info.get("statistic") == "count" else 1))
            elif name == "stagewatch_check_matches_total":
                if info.get("statistic") in ("proportion", "quantile"):
                    p = use.get("reference_share") or _share(instrumentation, check)
                    if faulty:
                        p = p - 2 * critical if info.get("direction") == "below" or p + 2 * critical > 1 else (
                            p + 2 * critical)
                    metric.labels(**labelled).inc(PER_TICK * min(1.0, max(0.0, p)))
                elif faulty:  # fixed-limit counts: failed runs, NaN outputs, dependency changes
                    metric.labels(**labelled).inc(max(1.0, critical))
            elif name == "stagewatch_check_bin_items_total":
                bins = int(use.get("bins", 10))
                for b in range(bins):
                    share = (1.0 if b == 0 else 0.0) if faulty else 1 / bins
                    metric.labels(**labelled, bin=str(b)).inc(PER_TICK * share)
            elif name == "stagewatch_reference_share":
                if "bins" in use or info.get("statistic") in ("psi", "chi_square"):
                    bins = int(use.get("bins", 10))
                    for b in range(bins):
                        metric.labels(**labelled, bin=str(b)).set(1 / bins)
                else:
                    metric.labels(**labelled, bin="").set(use.get("reference_share", 0.01))
            elif name == "stagewatch_reference_items_per_second":
                metric.labels(**labelled).set(PER_TICK / TICK_S)
            elif name == "stagewatch_reference_seconds":
                metric.labels(**labelled).set(1.0)
            elif name == "stagewatch_check_statistic":
                metric.labels(**labelled).set(2 * critical if faulty else 0.0)
            elif name == "stagewatch_level":
                metric.labels(**labelled).set(2 * critical if faulty else 0.0)
            elif name == "stagewatch_requests_total":
                metric.labels(**base).inc(PER_TICK)
            elif name == "stagewatch_request_errors_total":
                metric.labels(**base).inc(PER_TICK / 2 if faulty else 0)
            elif name == "stagewatch_request_duration_seconds":
                slo = float(use["bucket_le"])
                for _ in range(20):
                    metric.labels(**base).observe(slo * (4 if faulty else 0.2))
            elif name == "stagewatch_saturation_ratio":
                metric.labels(**base).set(0.99 if faulty else 0.3)
            elif name == "stagewatch_last_success_timestamp_seconds":
                metric.labels(**base).set(now - 30 * 86400 if faulty else now)
            elif name == "stagewatch_run_duration_seconds":
                metric.labels(**base).set(1 + 2 * critical if faulty else 1.0)
            elif name == "stagewatch_model_trained_timestamp_seconds":
                metric.labels(**base).set(now - (400 if faulty else 1) * 86400)
            elif name == "stagewatch_inference_duration_seconds":
                metric.labels(**base).observe(1 + 2 * critical if faulty else 1.0)


def _share(instrumentation: dict, check: str) -> float:
    for fam in instrumentation["families"]:
        for use in fam["uses"]:
            if use["check"] == check and "reference_share" in use:
                return use["reference_share"]
    return 0.01


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--port", type=int, default=9464)
    parser.add_argument("--address", default="127.0.0.1")
    parser.add_argument("--instrumentation", default=str(Path(__file__).with_name("instrumentation.json")))
    parser.add_argument("--fault", metavar="CHECK", help="plan metric id whose fault to play")
    parser.add_argument("--seconds", type=float, default=0, help="stop after this many seconds (0: run forever)")
    args = parser.parse_args()
    instrumentation = json.loads(Path(args.instrumentation).read_text())
    if args.fault and args.fault not in instrumentation["checks"]:
        parser.error(f"--fault {args.fault}: no such check in {args.instrumentation}")
    import prometheus_client

    if hasattr(prometheus_client, "disable_created_metrics"):
        prometheus_client.disable_created_metrics()  # the *_created series add nothing here
    registry = CollectorRegistry()
    metrics = build(instrumentation, registry)
    start_http_server(args.port, addr=args.address, registry=registry)
    print(f"serving {len(metrics)} metric families on http://{args.address}:{args.port}/metrics", flush=True)
    stop = time.monotonic() + args.seconds if args.seconds else None
    while stop is None or time.monotonic() < stop:
        tick(instrumentation, metrics, args.fault, time.time())
        time.sleep(TICK_S)


if __name__ == "__main__":
    main()
