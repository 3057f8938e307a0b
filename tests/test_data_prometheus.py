"""A real Prometheus on loopback: the exported rules, reference gauges from `calibrate`, statistics from `check`.

The scrape target serves what the data side writes (calibrate's and check's OpenMetrics output) next to per-bin
counters of a running stage. A healthy PSI check and a share check stay quiet; a mean shift published by `check`
fires; and a PSI check whose window has one bin that empties completely (its counter series never created) fires.
"""

from __future__ import annotations

import http.server
import subprocess
import threading
import time

import pytest
import yaml

from datagen import T0, data_args, write_declared_logs
from stagewatch.cli import main
from stagewatch.exporters.prometheus import alert_name, export_prometheus
from test_data_check import COLD_STORE, REF_END
from test_export import _free_port, _get, _start, _tool, _wait

pytestmark = pytest.mark.slow

HEALTHY_PSI = "probe.input.temp_c_drift"
EMPTIED_PSI = "spoilage_model.input.temp_c_drift"
SHIFTED_MEAN = "probe.input.level_shift"
QUIET_SHARE = "probe.input.temp_c_missing"


def _strip_eof(text: str) -> str:
    return "".join(line + "\n" for line in text.splitlines() if line.strip() != "# EOF")


def test_rules_fire_on_data_side_series_and_stay_quiet_on_healthy_ones(tmp_path, write, capsys):
    plan_path = tmp_path / "plan.yaml"
    assert main(["propose", str(write("pipeline.yaml", COLD_STORE)), "-o", str(plan_path)]) == 0
    plan = yaml.safe_load(plan_path.read_text())
    export_prometheus(plan, str(tmp_path / "export"))
    # Sized checks are evaluated once per window (group interval = window); a test cannot wait an hour, so the
    # server evaluates every group each second here (test_export checks that the intervals are written).
    for path in (tmp_path / "export" / "rules").glob("*.yml"):
        rules = yaml.safe_load(path.read_text())
        for group in rules["groups"]:
            group.pop("interval", None)
        path.write_text(yaml.safe_dump(rules, sort_keys=False))
    changes = {("probe", "temp_c"): (T0 + 13 * 86400, lambda v: v + 3.0)}
    paths = write_declared_logs(plan, tmp_path / "logs", changes=changes)
    capsys.readouterr()
    assert main(["calibrate", str(plan_path), *data_args(paths), "--to", REF_END, "-o", str(tmp_path / "base"),
                 "--format", "openmetrics"]) == 0
    references = capsys.readouterr().out
    assert main(["check", str(plan_path), "--baseline", str(tmp_path / "base"), *data_args(paths),
                 "--format", "openmetrics"]) == 4
    statistics = capsys.readouterr().out
    assert f'check="{SHIFTED_MEAN}"' in statistics

    shares = {}
    for line in references.splitlines():
        if line.startswith("stagewatch_reference_share{") and 'bin="' in line:
            labels, value = line.rsplit(" ", 1)
            check = labels.split('check="')[1].split('"')[0]
            b = int(labels.split('bin="')[1].split('"')[0])
            shares.setdefault(check, {})[b] = float(value)
    assert set(shares) >= {HEALTHY_PSI, EMPTIED_PSI}
    started = time.monotonic()

    def counters() -> str:
        # per-bin counters growing at 100 items a second in the reference's shares; the emptied check puts
        # nothing in its first bin, so that series is never created
        elapsed = time.monotonic() - started + 1
        out = ["# TYPE stagewatch_check_bin_items_total counter"]
        for check, stage in ((HEALTHY_PSI, "probe"), (EMPTIED_PSI, "spoilage_model")):
            ref = shares[check]
            weights = {b: s for b, s in ref.items() if not (check == EMPTIED_PSI and b == 0)}
            total = sum(weights.values())
            for b, s in weights.items():
                out.append(f'stagewatch_check_bin_items_total{{pipeline="cold-store",stage="{stage}",'
                           f'check="{check}",bin="{b}"}} {100 * elapsed * s / total:.3f}')
        out += ["# TYPE stagewatch_check_items_total counter", "# TYPE stagewatch_check_matches_total counter"]
        missing_share = next(float(line.rsplit(" ", 1)[1]) for line in references.splitlines()
                             if line.startswith("stagewatch_reference_share{") and f'check="{QUIET_SHARE}"' in line)
        labels = f'pipeline="cold-store",stage="probe",check="{QUIET_SHARE}"'
        out.append(f"stagewatch_check_items_total{{{labels}}} {100 * elapsed:.3f}")
        out.append(f"stagewatch_check_matches_total{{{labels}}} {100 * elapsed * missing_share:.3f}")
        return "\n".join(out) + "\n"

    body = lambda: (_strip_eof(references) + _strip_eof(statistics) + counters()).encode()  # noqa: E731

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self):  # noqa: N802 - the stdlib's name
            data = body()
            self.send_response(200)
            self.send_header("Content-Type", "text/plain; version=0.0.4")
            self.send_header("Content-Length", str(len(data)))
            self.end_headers()
            self.wfile.write(data)

        def log_message(self, *args):
            pass

    target_port, prom_port = _free_port(), _free_port()
    server = http.server.ThreadingHTTPServer(("127.0.0.1", target_port), Handler)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    config = {"global": {"scrape_interval": "1s", "evaluation_interval": "1s"},
              "rule_files": [str(p) for p in sorted((tmp_path / "export" / "rules").glob("*.yml"))],
              "scrape_configs": [{"job_name": "stage", "static_configs": [{"targets": [f"127.0.0.1:{target_port}"]}]}]}
    (tmp_path / "prometheus.yml").write_text(yaml.safe_dump(config))
    check = subprocess.run([_tool("promtool"), "check", "config", str(tmp_path / "prometheus.yml")],
                           capture_output=True, text=True)
    assert check.returncode == 0, check.stdout + check.stderr
    prometheus = _start([_tool("prometheus"), f"--config.file={tmp_path / 'prometheus.yml'}",
                         f"--storage.tsdb.path={tmp_path / 'tsdb'}", f"--web.listen-address=127.0.0.1:{prom_port}"],
                        tmp_path / "prometheus.log")
    base = f"http://127.0.0.1:{prom_port}"
    try:
        _wait(f"{base}/-/ready", time.monotonic() + 60)
        wanted = {alert_name(SHIFTED_MEAN), alert_name(EMPTIED_PSI)}
        deadline = time.monotonic() + 60
        firing: set[str] = set()
        while time.monotonic() < deadline:
            alerts = _get(f"{base}/api/v1/alerts")["data"]["alerts"]
            firing = {a["labels"]["alertname"] for a in alerts if a["state"] == "firing"}
            if wanted <= firing:
                break
            time.sleep(1)
        log = (tmp_path / "prometheus.log").read_text()[-1500:]
        assert wanted <= firing, (firing, log)
        time.sleep(3)  # a few more evaluations with every series present
        alerts = _get(f"{base}/api/v1/alerts")["data"]["alerts"]
        firing = {a["labels"]["alertname"] for a in alerts if a["state"] == "firing"}
        assert alert_name(HEALTHY_PSI) not in firing
        assert alert_name(QUIET_SHARE) not in firing
    finally:
        prometheus.terminate()
        prometheus.wait(timeout=15)
        server.shutdown()
