"""The PromQL each signal writes, run by promtool and compared with the plan's own statistics."""

from __future__ import annotations

import shutil
import subprocess

import numpy as np
import pytest
import yaml

from stagewatch import binned
from stagewatch.exporters.signals import BinSignal, counter

STEP_S = 60
WINDOW_STEPS = 10  # window "10m" at a 1m step: Prometheus 2.x ranges are closed, so increase() is exact here


def _promtool() -> str:
    path = shutil.which("promtool")
    assert path, "promtool is not installed; `make test` installs it (.ci/install-tools)"
    return path


def _psi_signal(bins: int, critical: float) -> BinSignal:
    metric = {"id": "scorer.input.amount_drift", "statistic": "psi", "params": {"bins": bins}, "window": "10m",
              "warn": None, "critical": critical, "direction": "above", "severity": "page"}
    return BinSignal(metric, "tiny", "scorer", {})


def _run_rules(tmp_path, sig: BinSignal, alerts: list[dict], series: dict[str, list[float | None]],
               eval_min: int, expected: list[tuple[str, bool]]) -> subprocess.CompletedProcess:
    rules = {"groups": [{"name": "psi", "rules": [*sig.recording(), *alerts]}]}
    (tmp_path / "rules.yml").write_text(yaml.safe_dump(rules, sort_keys=False))

    def fmt(values):
        return " ".join("_" if v is None else repr(float(v)) for v in values)

    test = {"rule_files": ["rules.yml"], "evaluation_interval": "1m", "tests": [{
        "interval": "1m",
        "input_series": [{"series": k, "values": fmt(v)} for k, v in series.items()],
        "alert_rule_test": [{"eval_time": f"{eval_min}m", "alertname": name,
                             "exp_alerts": [{"exp_labels": {"pipeline": sig.pipeline, "stage": sig.stage,
                                                           "check": sig.check}}] if fires else []}
                            for name, fires in expected]}]}
    (tmp_path / "test.yml").write_text(yaml.safe_dump(test, sort_keys=False))
    return subprocess.run([_promtool(), "test", "rules", str(tmp_path / "test.yml")], capture_output=True,
                          text=True, timeout=120)


def _bin_series(sig: BinSignal, reference_counts: np.ndarray, per_step: list[list[float] | None],
                steps: int) -> dict[str, list[float | None]]:
    """Counters per bin (None: the bin's series is never created) and the smoothed reference shares."""
    labels = sig.check_labels
    ref = binned.smoothed_shares(reference_counts)
    series: dict[str, list[float | None]] = {}
    for i, increments in enumerate(per_step):
        key = f'{{{labels}, bin="{i}"}}'
        if increments is not None:
            series["stagewatch_check_bin_items_total" + key] = counter([0.0] + increments * (steps - 1))
        series["stagewatch_reference_share" + key] = [float(ref[i])] * steps
    return series


def _only_value(sig: BinSignal, expected: float) -> list[dict]:
    """Two alerts that bracket the recorded value: one fires only if it equals ``expected`` to 1e-9."""
    value = f'stagewatch:check_value{{check="{sig.check}"}}'
    return [{"alert": "ValueMatches", "expr": f"abs({value} - {expected!r}) < 1e-9"},
            {"alert": "ValueDiffers", "expr": f"abs({value} - {expected!r}) >= 1e-9"},
            {"alert": "Critical", "expr": f"{value} > {sig.metric['critical']!r}"}]


def test_promql_psi_equals_the_plan_psi_on_the_same_counters(tmp_path):
    rng = np.random.default_rng(11)
    bins = 6
    reference = rng.multinomial(6000, np.full(bins, 1 / bins))
    increments = [[float(x)] for x in rng.multinomial(80, [0.25, 0.2, 0.2, 0.15, 0.1, 0.1])]
    window = np.array([x[0] for x in increments]) * WINDOW_STEPS
    sig = _psi_signal(bins, critical=0.25)
    # The plan's PSI: binned.psi with +0.5 smoothing on the reference counts and the window counts.
    expected = binned.psi(reference, window, smoothing=0.5)
    steps = WINDOW_STEPS + 3
    result = _run_rules(tmp_path, sig, _only_value(sig, expected),
                        _bin_series(sig, reference, increments, steps), steps - 1,
                        [("ValueMatches", True), ("ValueDiffers", False), ("Critical", expected > 0.25)])
    assert result.returncode == 0, result.stdout + result.stderr


def test_promql_psi_can_tell_a_wrong_value(tmp_path):
    # The equality check above can fail: the same series against a value off by 1e-6 does not match.
    bins = 4
    reference = np.array([1000, 1000, 1000, 1000])
    increments = [[40.0], [30.0], [20.0], [10.0]]
    sig = _psi_signal(bins, critical=0.25)
    wrong = binned.psi(reference, np.array([400, 300, 200, 100])) + 1e-6
    steps = WINDOW_STEPS + 3
    result = _run_rules(tmp_path, sig, _only_value(sig, wrong), _bin_series(sig, reference, increments, steps),
                        steps - 1, [("ValueMatches", True)])
    assert result.returncode != 0


def test_a_bin_whose_series_was_never_created_reads_as_empty_and_fires(tmp_path):
    # A whole bin vanishes: its counter series never appears. Read as nothing, PSI over the other bins would stay
    # small; read as an empty bin it is the plan's PSI of the emptied window, far past the threshold.
    bins = 5
    reference = np.array([2000, 2000, 2000, 2000, 2000])
    increments: list[list[float] | None] = [None, [25.0], [25.0], [25.0], [25.0]]
    window = np.array([0, 250, 250, 250, 250])
    expected = binned.psi(reference, window, smoothing=0.5)
    assert expected > 1.0  # about 1.6: a fifth of the mass at share 0.5/1002.5
    sig = _psi_signal(bins, critical=0.25)
    steps = WINDOW_STEPS + 3
    result = _run_rules(tmp_path, sig, _only_value(sig, expected),
                        _bin_series(sig, reference, increments, steps), steps - 1,
                        [("ValueMatches", True), ("ValueDiffers", False), ("Critical", True)])
    assert result.returncode == 0, result.stdout + result.stderr


def test_a_check_without_any_bin_series_records_nothing(tmp_path):
    # The reference alone (nothing instrumented yet) must not read as a window of empty bins.
    sig = _psi_signal(3, critical=0.25)
    steps = WINDOW_STEPS + 3
    result = _run_rules(tmp_path, sig, [{"alert": "Recorded", "expr": f'stagewatch:check_value{{check="{sig.check}"}}'}],
                        _bin_series(sig, np.array([10, 10, 10]), [None, None, None], steps), steps - 1,
                        [("Recorded", False)])
    assert result.returncode == 0, result.stdout + result.stderr


@pytest.mark.parametrize("statistic", ["psi", "chi_square"])
def test_python_mirror_of_the_promql_matches_the_plan_statistics(statistic):
    # statistic_of is what the rule tests use to build faults; it must agree with the plan's functions.
    from stagewatch.exporters.signals import statistic_of

    reference = np.array([500, 300, 150, 50])
    window = np.array([90, 60, 30, 20])
    if statistic == "psi":
        assert statistic_of("psi", list(window), list(binned.smoothed_shares(reference))) == pytest.approx(
            binned.psi(reference, window))
    else:
        # Against a reference known exactly (one-sample chi-square), w = sqrt(sum (a - e)^2 / e).
        e = reference / reference.sum()
        a = window / window.sum()
        from scipy import stats as st

        chi2 = st.chisquare(window, e * window.sum()).statistic
        assert statistic_of("chi_square", list(window), list(e)) == pytest.approx(np.sqrt(chi2 / window.sum()))
        assert statistic_of("chi_square", list(window), list(e)) == pytest.approx(
            np.sqrt(np.sum((a - e) ** 2 / e)))
