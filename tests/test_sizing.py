"""Windows and thresholds follow volume, change rate and the false-alarm budget."""

from __future__ import annotations

import pytest

from conftest import all_pipelines
from stagewatch import durations, sizing, stats
from stagewatch.plan import all_metrics, compose
from stagewatch.spec import load_pipeline

BUDGET = sizing.Budget(pages_per_week=1, tickets_per_week=5, page_checks=10, ticket_alerts=20)


def _metric(**kw):
    base = {"id": "s.input.x", "statistic": "psi", "params": {"bins": 10}, "window": "auto", "reference": "28d",
            "warn": 0.1, "critical": 0.25, "direction": "above", "severity": "page"}
    base.update(kw)
    return base


def _window(result):
    return durations.parse(result["window"])


def test_low_volume_gets_a_longer_window_than_high_volume():
    high = sizing.size_metric(_metric(), sizing.Traffic(50_000, "minutes"), BUDGET)
    low = sizing.size_metric(_metric(), sizing.Traffic(20, "minutes"), BUDGET)
    assert _window(low) > _window(high)
    assert low["review"] and "volume too low" in low["review"]
    assert high["review"] is None


def test_minutes_stage_gets_a_shorter_window_than_months_stage():
    fast = sizing.size_metric(_metric(), sizing.Traffic(5_000, "minutes"), BUDGET)
    slow = sizing.size_metric(_metric(), sizing.Traffic(5_000, "months"), BUDGET)
    assert _window(fast) < _window(slow)
    assert _window(fast) == sizing.CHANGE_RATE_WINDOWS["minutes"][0]


def test_threshold_raised_when_even_the_longest_window_is_too_noisy():
    result = sizing.size_metric(_metric(), sizing.Traffic(0.05, "days"), BUDGET)
    assert result["window"] == "30d"
    assert result["critical"] > 0.25
    assert result["critical"] >= result["sizing"]["noise_floor"]
    assert "raised the critical threshold" in result["sizing"]["derivation"]


def test_conventional_psi_threshold_below_floor_lengthens_the_window():
    # At 2,000 items/h a 1h window has a PSI floor above 0.01 for a page-level alpha, so a threshold of 0.01
    # forces a longer window, and the derivation says so.
    traffic = sizing.Traffic(2_000, "hours")
    result = sizing.size_metric(_metric(critical=0.01, warn=None), traffic, BUDGET)
    assert _window(result) > 3600
    assert "lengthened the window" in result["sizing"]["derivation"]
    floor_1h = stats.PSI(bins=10).floor(2000, 2000 * 4, BUDGET.page_share / 168)
    assert floor_1h > 0.01


def test_alpha_is_the_budget_share_over_evaluations():
    result = sizing.size_metric(_metric(), sizing.Traffic(10_000, "hours"), BUDGET)
    evaluations = durations.WEEK / _window(result)
    assert result["sizing"]["alpha"] == pytest.approx(BUDGET.page_share / evaluations, rel=1e-2)


def test_burn_rate_sizing_uses_the_workbook_pairs():
    # SRE Workbook, ch. 5, table 5-8 (30-day SLO): 14.4 over 1h/5m, 6 over 6h/30m, 1 over 3d/6h.
    result = sizing.size_metric(_metric(statistic="burn_rate"), sizing.Traffic(1000, "hours"), BUDGET)
    pairs = [(p["long_window"], p["short_window"], p["burn_rate"], p["severity"])
             for p in result["sizing"]["burn_rate_alerts"]]
    assert pairs == [("1h", "5m", 14.4, "page"), ("6h", "30m", 6, "page"), ("3d", "6h", 1, "ticket")]
    assert result["critical"] == 14.4


@pytest.mark.parametrize("source", all_pipelines(), ids=lambda p: p.stem)
def test_every_metric_is_sized_and_the_budget_holds(source):
    pipeline = load_pipeline(str(source))
    plan = compose(pipeline)
    for metric in all_metrics(plan):
        block = metric["sizing"]
        assert block["derivation"]
        if metric["statistic"] in stats.STATISTICS:
            for key in ("samples_per_window", "alpha", "noise_floor", "detectable_change"):
                assert key in block, (metric["id"], key)
            if metric["critical"] is not None:
                assert metric["critical"] >= block["noise_floor"], metric["id"]
            if metric.get("warn") is not None:
                assert metric["warn"] >= block["warn_noise_floor"], metric["id"]
    budget = plan["budget"]
    assert budget["expected_false_pages_per_week"] <= pipeline.false_alarms_per_week
    assert budget["expected_false_tickets_per_week"] <= pipeline.false_tickets_per_week
    total = sum(m["sizing"].get("expected_false_alarms_per_week", 0) for m in all_metrics(plan)
                if m["severity"] == "page" and m["statistic"] in stats.STATISTICS)
    assert budget["expected_false_pages_per_week"] == pytest.approx(total, rel=1e-2, abs=1e-12)


def test_label_delayed_quality_uses_labelled_volume_and_lag():
    pipeline = load_pipeline(str(all_pipelines()[0]))
    plan = compose(pipeline)
    quality = next(m for m in all_metrics(plan) if m["id"] == "grade_assigner.output.quality")
    stage = pipeline.stage("grade_assigner")
    assert quality["sizing"]["evaluation_lag"] == stage.label_delay
    per_hour = stage.volume_per_hour * stage.labelled_share
    assert quality["sizing"]["samples_per_window"] == pytest.approx(per_hour * durations.parse(quality["window"])
                                                                    / 3600, rel=1e-3)


def test_round_up_never_goes_below():
    for x in (0.01234, 0.25, 1.0001, 37.2, 0.0009991):
        assert sizing.round_up(x) >= x


def test_no_traffic_is_flagged_not_a_crash():
    result = sizing.size_metric(_metric(), sizing.Traffic(0, "days"), BUDGET)
    assert "no traffic" in result["review"] and result["sizing"]["samples_per_window"] == 0
