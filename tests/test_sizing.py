"""Windows and thresholds follow volume, change rate and the false-alarm budget."""

from __future__ import annotations

import math

import pytest

from conftest import all_pipelines
from stagewatch import durations, sizing, stats
from stagewatch import binned
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
    # 2,000 items in the 1h window are more than PSI's 1,000 (100 per bin), so the floor was the only reason.
    assert "so that it has a noise floor under the threshold" in result["sizing"]["derivation"]
    assert "samples per window this statistic needs" not in result["sizing"]["derivation"]


def test_a_window_lengthened_for_samples_says_so():
    # 2,400 items an hour give 600 in the 15m target window, fewer than the 1,000 a 10-bin PSI needs (100 per bin),
    # while its noise floor there is far under 0.25: (n m / (n + m)) PSI follows a chi-square law with 9 degrees
    # of freedom under no change (scipy's chi2). So the window is lengthened for the samples, not the floor.
    from scipy.stats import chi2

    result = sizing.size_metric(_metric(), sizing.Traffic(2_400, "minutes"), BUDGET)
    assert result["window"] == "30m"
    n, m = 600, 2_400 * 28 * 24
    assert chi2.isf(BUDGET.page_share / (durations.WEEK / 900), 9) * (n + m) / (n * m) < 0.25
    text = result["sizing"]["derivation"]
    assert ("lengthened the window from the 15m target for change rate 'minutes' to 30m so that it holds the 1,000 "
            "samples per window this statistic needs (the 15m window holds 600)") in text
    assert "noise floor under the threshold" not in text


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


def _failures_over(rate, requests, target):
    """The smallest whole count of failures whose share of ``requests`` is above rate x (1 - target), in exact
    fractions: the Workbook's page condition (ch. 5, table 5-8), independent of the float arithmetic in sizing."""
    from fractions import Fraction
    bound = Fraction(str(rate)) * (1 - Fraction(str(target))) * Fraction(requests)
    return math.floor(bound) + 1


def test_burn_rate_flags_only_when_one_failure_pages():
    # SRE Workbook ch. 5: burn rate = error ratio / (1 - SLO); at 99.9% the 30-day page pair is 14.4 over 1h with a
    # 5m short window (table 5-8), and the exported rule asks both windows to be above the rate.
    def sized(per_hour):
        traffic = sizing.Traffic(per_hour, "hours", slo_target=0.999, slo_period="30d")
        return sizing.size_metric(_metric(statistic="burn_rate"), traffic, BUDGET)

    busy = sized(5000)  # 5,000 / 12 = 416.7 requests per 5m: one failure is (1/416.7)/0.001 = 2.4, not 14.4
    assert busy["review"] is None
    text = busy["sizing"]["derivation"]
    assert "one failure there is a burn rate of 2.4," in text
    assert f"at least {_failures_over(14.4, 5000 / 12, 0.999)} failures in the 5m window" in text  # > 6.0: 7
    assert f"and {_failures_over(14.4, 5000, 0.999)} in the 1h window" in text  # > 72: 73
    # 100 an hour: one failure is 10 over the 1h window and 1.67 over the 6h one, under 14.4 and 6: no page.
    assert _failures_over(14.4, 100, 0.999) == 2 and _failures_over(6, 600, 0.999) == 4
    assert sized(100)["review"] is None
    # 60 an hour: one failure is (1/60)/0.001 = 16.7 over the 1h window, above 14.4, and 200 over 5m: it pages.
    assert _failures_over(14.4, 60, 0.999) == 1
    lonely = sized(60)["review"]
    assert lonely and "one failure pages" in lonely and "burn rate of 16.7" in lonely


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
    total = sum(sizing.number(m["sizing"].get("expected_false_alarms_per_week")) for m in all_metrics(plan)
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


# --- the plan's own numbers, checked by simulation ------------------------------------------------------------

LOW_VOLUME = """
pipeline: kiosk
context: business
stages:
  - id: tickets
    kind: source
    modality: events
    output: records
    serving: batch
    volume_per_hour: 60
  - id: estimator
    kind: learned
    modality: tabular
    output: value
    upstream: [tickets]
    serving: batch
    volume_per_hour: 60
    inputs:
      - {name: amount, type: numeric}
      - {name: desk, type: category}
  - id: ranker
    kind: learned
    modality: tabular
    output: score
    upstream: [estimator]
    serving: batch
    volume_per_hour: 60
"""

PLAN_CHECKS = {
    "psi": "estimator.input.amount_drift", "chi_square": "estimator.input.desk_mix",
    "ks": "tickets.input.session_length", "proportion": "estimator.input.amount_missing",
    "quantile": "ranker.output.above_cutoff", "mean": "estimator.output.value_mean",
    "count": "tickets.output.record_count",
}


def _observed(statistic, metric, n, m, shift, rng, trials):
    """`trials` observed values of the statistic for windows of n against references of m, true change `shift`."""
    import numpy as np
    from scipy import optimize
    from scipy import stats as st

    n, m = int(round(n)), int(round(m)) if m else None
    params = metric.get("params") or {}
    if statistic in ("psi", "chi_square"):
        k = params.get("bins") or params.get("categories")
        p0 = np.full(k, 1 / k)
        if statistic == "psi":
            direction = np.linspace(-1, 1, k)
            psi_of = lambda s: float(np.sum((p0 * (1 + s * direction) - p0) * np.log(1 + s * direction)))  # noqa
            scale = optimize.brentq(lambda s: psi_of(s) - shift, 0, 0.99) if shift > 0 else 0.0
            p1 = p0 * (1 + scale * direction)
            return [binned.psi(rng.multinomial(m, p0), rng.multinomial(n, p1), smoothing=0) for _ in range(trials)]
        u = np.zeros(k)
        u[0], u[1] = 1 / math.sqrt(2), -1 / math.sqrt(2)
        p1 = p0 + shift * np.sqrt(p0) * u
        return [binned.effect_size_w(rng.multinomial(m, p0), rng.multinomial(n, p1)) for _ in range(trials)]
    if statistic == "ks":
        s = 2 * st.norm.ppf((1 + shift) / 2)
        return [st.ks_2samp(rng.normal(0, 1, m), rng.normal(s, 1, n)).statistic for _ in range(trials)]
    if statistic in ("proportion", "quantile"):
        p0 = 1 - params["q"] if statistic == "quantile" else params["baseline"]
        return list(rng.binomial(n, p0 + shift, trials) / n - rng.binomial(m, p0, trials) / m)
    if statistic == "mean":
        return list(rng.normal(shift, 1 / math.sqrt(n), trials) - rng.normal(0, 1 / math.sqrt(m), trials))
    return list(rng.poisson(n * (1 + shift), trials) / n - 1)  # count: relative change, reference rate known


@pytest.mark.parametrize("statistic", sorted(PLAN_CHECKS))
def test_plan_thresholds_hold_their_alpha_and_catch_the_stated_change(statistic, tmp_path):
    import numpy as np

    source = tmp_path / "p.yaml"
    source.write_text(LOW_VOLUME)
    plan = compose(load_pipeline(str(source)))
    metric = next(m for m in all_metrics(plan) if m["id"] == PLAN_CHECKS[statistic])
    assert metric["statistic"] == statistic
    block = metric["sizing"]
    n, m, alpha = block["samples_per_window"], block.get("reference_samples"), block["alpha"]
    trials = 800 if statistic == "ks" else 4000
    rng = np.random.default_rng(7)
    tolerance = 3 * math.sqrt(alpha * (1 - alpha) / trials) + 2 / trials
    two_sided = metric["direction"] == "both"

    def fired(values, threshold):
        values = np.asarray(values)
        return float(np.mean(np.abs(values) > threshold if two_sided else values > threshold))

    calm = _observed(statistic, metric, n, m, 0.0, rng, trials)
    # No shift: at the plan's noise floor the false-alarm rate is its alpha; at its critical threshold, no more.
    assert fired(calm, block["noise_floor"]) <= alpha + tolerance + 0.25 * alpha
    assert fired(calm, metric["critical"]) <= alpha + tolerance
    # A true change of the stated size makes the critical alert fire with at least the stated power.
    shifted = _observed(statistic, metric, n, m, block["detectable_change"], rng, trials)
    assert fired(shifted, metric["critical"]) >= block["power"] - 3 * math.sqrt(0.16 / trials)


def test_numbers_set_by_a_person_are_explained_not_changed():
    result = sizing.size_metric(_metric(window="1h", critical=0.001, warn=0.0005), sizing.Traffic(2_000, "hours"),
                                BUDGET)
    assert result["critical"] == 0.001 and result["warn"] == 0.0005 and result["window"] == "1h"
    assert "kept the critical threshold 0.001 as set" in result["sizing"]["derivation"]


def test_figures_carry_no_false_precision():
    # Whole sample counts; expected counts below 1e-6 read "< 1e-6"; three significant figures otherwise.
    plan = compose(load_pipeline(str(all_pipelines()[0])))
    for metric in all_metrics(plan):
        block = metric["sizing"]
        assert isinstance(block.get("samples_per_window", 0), int), metric["id"]
        assert isinstance(block.get("reference_samples", 0), int), metric["id"]
        for key in ("expected_false_alarms_per_week", "expected_false_warnings_per_week"):
            value = block.get(key)
            if isinstance(value, str):
                assert value == "< 1e-6"
            elif value:
                assert value >= 1e-6 and float(f"{value:.3g}") == value, (metric["id"], key, value)
    assert sizing.shown(2.43e-175) == "< 1e-6" and sizing.shown(0.012345) == 0.0123
    assert "under independent items" in plan["budget"]["noise_model"]


def test_budget_shares_sit_on_a_1_2_5_ladder_and_never_sum_past_the_budget():
    assert [sizing.ladder_down(x) for x in (7, 1, 0.5, 0.0294, 0.0199, 3e-5)] == [5, 1, 0.5, 0.02, 0.01, 2e-5]
    metrics = [{"id": f"{owner}.input.m{i}", "statistic": "psi", "severity": sev, "critical": 0.2,
                "warn": 0.1 if i % 2 else None}
               for owner, count in (("a", 3), ("b", 7), ("pipeline", 1)) for i in range(count)
               for sev in ("page",)]
    budget = sizing.make_budget(metrics, 1.0, 5.0, owners=["a", "b", "c", "pipeline"])
    pages = sum(budget.share(m, "page") for m in metrics)
    tickets = sum(budget.share(m, "ticket") for m in metrics if m["warn"] is not None)
    assert pages <= 1.0 and tickets <= 5.0
    # a stage's share does not depend on another stage's count
    fewer = sizing.make_budget(metrics[:3] + metrics[4:], 1.0, 5.0, owners=["a", "b", "c", "pipeline"])
    assert fewer.share(metrics[0], "page") == budget.share(metrics[0], "page")


def test_a_small_raise_to_the_noise_floor_is_noted_not_flagged():
    # A mean shift's floor is z(alpha/2) sqrt(1/n + 1/m) (two-sided z-test), checked here with scipy's normal law.
    # At 0.05 items an hour a 30d window holds 36 items against a reference of 4 windows (144), and the floor is
    # about 0.148 reference standard deviations.
    from scipy.stats import norm

    def sized(critical):
        metric = _metric(statistic="mean", params={}, critical=critical, warn=None, direction="both")
        return sizing.size_metric(metric, sizing.Traffic(0.05, "months"), BUDGET)

    slight, far = sized(0.145), sized(0.1)
    for result in (slight, far):
        block = result["sizing"]
        assert (result["window"], block["samples_per_window"], block["reference_samples"]) == ("30d", 36, 144)
        floor = norm.isf(block["alpha"] / 2) * math.sqrt(1 / 36 + 1 / 144)
        assert floor == pytest.approx(block["noise_floor"], rel=2e-2)
        assert result["critical"] == 0.15 >= floor
    # 0.145 -> 0.15 is a raise of 3%, within the 10% tolerance: raised and said so, no review flag.
    assert slight["review"] is None
    assert "raised the critical threshold from 0.145 to 0.15" in slight["sizing"]["derivation"]
    assert "a raise of 3%" in slight["sizing"]["derivation"]
    # 0.1 -> 0.15 is a raise of 50%: the reviewer should see it.
    assert far["review"] == "volume too low: even a 30d window needs a threshold of 0.15 instead of 0.1"
    assert "raised the critical threshold from 0.1 to 0.15" in far["sizing"]["derivation"]
