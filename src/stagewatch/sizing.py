"""Windows and thresholds sized by statistics, with the derivation written out.

The check window must be short enough to catch a change at the stage's ``change_rate`` and long enough to hold the
samples its statistic needs at the stage's volume. The pipeline's false-alarm budget is split evenly over its
stages, then over each stage's statistical checks (a Bonferroni split of the expected count of false alarms per
week, see :class:`stagewatch.budget.Budget`); each check's per-evaluation
alpha sets its noise floor, and no suggested threshold sits below that floor.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from stagewatch import durations, stats
from stagewatch import burn_rates
# The budget's split lives in budget.py; plan.py and the tests reach it through this module.
from stagewatch.budget import Budget, is_statistical, ladder_down, make_budget, owner_of  # noqa: F401
from stagewatch.durations import HOUR, WEEK

# Detection target and the longest acceptable window per change rate, in seconds (a design decision, documented
# in DEVELOPERS.md): a window should be no longer than the time in which the stage's data can move.
CHANGE_RATE_WINDOWS = {
    "minutes": (15 * 60, 3600),
    "hours": (3600, 6 * 3600),
    "days": (86400, 7 * 86400),
    "months": (7 * 86400, 30 * 86400),
}
LADDER = [durations.parse(w) for w in
          ("5m", "15m", "30m", "1h", "2h", "3h", "6h", "12h", "1d", "2d", "3d", "7d", "14d", "30d")]
LONGEST = LADDER[-1]
POWER = stats.DEFAULT_POWER


@dataclass(frozen=True)
class Traffic:
    """What a metric sees: items per hour, how fast they change, and label timing for quality metrics."""

    per_hour: float
    change_rate: str
    label_delay: str | None = None
    slo_target: float | None = None
    slo_period: str | None = None
    latency_slo_ms: float | None = None
    run_every: str | None = None  # a batch stage's period: windows are whole runs


def _sig(x: float | None, digits: int = 4) -> float | int | None:
    """``x`` to ``digits`` significant digits; whole numbers come back as int so the YAML reads ``9000``."""
    if x is None or x == 0 or math.isinf(x) or math.isnan(x):
        return x
    out = float(f"{x:.{digits}g}")
    return int(out) if out.is_integer() and abs(out) >= 1 else out


SMALLEST_SHOWN = 1e-6
BELOW_SHOWN = "< 1e-6"


def shown(x: float | None) -> float | int | str | None:
    """A probability or expected count as the plan shows it: three significant figures, and "< 1e-6" below that
    (a figure like 2.43e-175 claims a precision that no model of real traffic has)."""
    if x is not None and 0 < x < SMALLEST_SHOWN:
        return BELOW_SHOWN
    return _sig(x, 3)


def number(x: Any) -> float:
    """The number behind a shown figure: "< 1e-6" counts as its bound 1e-6, so that a sum of them is an upper
    bound rather than a misleading 0; None counts as 0."""
    if isinstance(x, str):
        return SMALLEST_SHOWN
    return float(x or 0)


def _compact(block: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in block.items() if v is not None}


def round_up(x: float, digits: int = 2) -> float:
    """``x`` rounded up to ``digits`` significant digits, so a raised threshold stays above its floor."""
    if x <= 0:
        return x
    scale = 10 ** (math.floor(math.log10(x)) - digits + 1)
    return float(f"{math.ceil(x / scale - 1e-9) * scale:.{digits + 2}g}")


# Our rule: a threshold raised to its noise floor by at most 10% of itself is raised and noted in the derivation,
# but not flagged for review. Such raises come from rounding the floor up to two figures or from a floor a hair
# above a threshold that the exact law still accepts; a flag for 0.04 -> 0.041 teaches reviewers to skip flags.
RAISE_TOLERANCE = 0.10


def material_raise(threshold: float, raised: float) -> bool:
    """Whether raising ``threshold`` to ``raised`` is worth a reviewer's attention (more than RAISE_TOLERANCE).

    >>> material_raise(0.04, 0.041), material_raise(0.25, 0.3)
    (False, True)
    """
    return raised > threshold * (1 + RAISE_TOLERANCE) + 1e-12


def _statistic(metric: dict[str, Any]) -> stats.Statistic:
    sides = 2 if metric["direction"] == "both" else 1
    tail = "below" if (metric.get("reads") or {}).get("condition") == "below_quantile" else "above"
    return stats.make(metric["statistic"], sides=sides, direction=metric["direction"], tail=tail,
                      **(metric.get("params") or {}))


def _reference_samples(reference: str, per_hour: float, n: float) -> float | None:
    if durations.is_duration(reference):
        return per_hour * durations.parse(reference) / HOUR
    if reference == "previous":
        return n
    return None  # training set or a fixed reference: taken as known exactly


def _fmt(x: float) -> str:
    if x >= 1000:
        return f"{x:,.0f}"
    return f"{x:.3g}"


@dataclass
class _Trial:
    window: int
    n: float
    m: float | None
    evaluations: float
    alpha: float
    floor: float
    sound: bool


REFERENCE_MULTIPLE = 4  # common practice: a reference several times longer than the window it judges


def reference_for(reference: str, window: int) -> str:
    """The reference period, lengthened to at least REFERENCE_MULTIPLE windows when it is a duration."""
    if durations.is_duration(reference) and durations.parse(reference) < REFERENCE_MULTIPLE * window:
        return durations.format(REFERENCE_MULTIPLE * window)
    return reference


def _trial(stat: stats.Statistic, metric: dict[str, Any], traffic: Traffic, budget: Budget, window: int) -> _Trial:
    n = traffic.per_hour * window / HOUR
    reference = metric.get("reference", "28d")
    if metric.get("window", "auto") == "auto":
        reference = reference_for(reference, window)
    m = _reference_samples(reference, traffic.per_hour, n)
    evaluations = WEEK / window
    share = budget.share(metric, "page" if metric["severity"] == "page" else "ticket")
    alpha = min(0.5, share / evaluations)
    enough = n >= stat.min_samples()
    critical = metric.get("critical")
    if n <= 0:
        return _Trial(window, n, m, evaluations, alpha, math.inf, False)
    # The floor is the smallest threshold whose false-alarm probability is alpha, so a critical threshold clears
    # it exactly when its own probability is within alpha; the floor itself is computed for the chosen window.
    sound = enough and (critical is None or stat.false_alarm(critical, n, m) <= alpha)
    return _Trial(window, n, m, evaluations, alpha, math.nan, sound)


def _why_longer(stat: stats.Statistic, metric: dict[str, Any], trials: list[_Trial], chosen: _Trial,
                traffic: Traffic) -> str:
    """Why the windows shorter than the chosen one were not used: too few samples for the statistic, a noise
    floor above the critical threshold, or both (the note must give the reason that held)."""
    at = trials.index(chosen)
    if at == 0:  # a batch stage whose first whole number of runs lies past the target
        return f" (the first whole number of {traffic.run_every} runs from the target)"
    shorter = trials[at - 1]
    few = shorter.n < stat.min_samples()
    critical = metric.get("critical")
    noisy = critical is not None and shorter.n > 0 and stat.false_alarm(critical, shorter.n, shorter.m) > shorter.alpha
    samples = (f"the {stat.min_samples():,} samples per window this statistic needs (the "
               f"{durations.format(shorter.window)} window holds {_fmt(shorter.n)})")
    floor = "a noise floor under the threshold"
    reason = (f"{samples} and {floor}" if few and noisy else samples if few else floor)
    if not chosen.sound:
        return f", the longest tried: no shorter window gives {reason}"
    return f" so that it holds {reason}" if few else f" so that it has {reason}"


def _with_floor(stat: stats.Statistic, trial: _Trial) -> _Trial:
    if math.isnan(trial.floor):
        trial.floor = stat.floor(trial.n, trial.m, trial.alpha)
    return trial


def size_metric(metric: dict[str, Any], traffic: Traffic, budget: Budget) -> dict[str, Any]:
    """Choose window and thresholds for one metric and explain them.

    ``metric`` carries ``statistic``, ``params``, ``window`` (``auto`` or a duration), ``reference``, ``warn``,
    ``critical``, ``direction`` and ``severity``. Returns a dict with ``window``, ``warn``, ``critical``,
    ``review`` (a reason, or None) and the ``sizing`` block.
    """
    statistic = metric["statistic"]
    if statistic == stats.BURN_RATE:
        return _size_burn_rate(metric, traffic)
    if statistic == stats.LEVEL:
        return _size_level(metric, traffic)
    return _size_statistical(metric, traffic, budget)


def _target(traffic: Traffic) -> tuple[int, int]:
    target, longest = CHANGE_RATE_WINDOWS[traffic.change_rate]
    if traffic.run_every:  # a batch stage is judged on whole runs: never a window shorter than its period
        period = durations.parse(traffic.run_every)
        target, longest = max(target, period), max(longest, period)
    return target, longest


def _windows(traffic: Traffic, target: int) -> list[int]:
    """Candidate windows from ``target`` up: the ladder, or for a batch stage whole multiples of its period (a
    window of a day and a half would hold one run or two depending on the time of day)."""
    if not traffic.run_every:
        return [w for w in LADDER if w >= target]
    period = durations.parse(traffic.run_every)
    multiples = {period * k for k in (1, 2, 3, 4, 7, 14, 30) if period * k <= max(LONGEST, period)}
    multiples |= {w for w in LADDER if w >= period and w % period == 0}
    return sorted(w for w in multiples if w >= target)


def _size_level(metric: dict[str, Any], traffic: Traffic) -> dict[str, Any]:
    window = metric.get("window", "auto")
    seconds = _target(traffic)[0] if window == "auto" else durations.parse(window)
    derivation = (f"A fixed limit on a level ({metric.get('unit', 'value')}): it has no sampling noise to size, "
                  f"so it fires only when the level crosses the limit. Checked over {durations.format(seconds)}.")
    return {"window": durations.format(seconds), "warn": metric.get("warn"), "critical": metric.get("critical"),
            "review": None,
            "sizing": {"method": "fixed limit", "derivation": derivation}}


def _size_burn_rate(metric: dict[str, Any], traffic: Traffic) -> dict[str, Any]:
    target = traffic.slo_target or 0.999
    period_s = durations.parse(traffic.slo_period or "30d")
    alerts = burn_rates.burn_rate_alerts(period_s)
    fast = alerts[0]
    slow = alerts[-1]
    requests = traffic.per_hour * fast["short_window_s"] / HOUR
    budget_errors = (1 - target) * requests
    pairs = [{"severity": a["severity"], "long_window": durations.format(a["long_window_s"]),
              "short_window": durations.format(a["short_window_s"]), "burn_rate": _sig(a["burn_rate"]),
              "budget_consumed": a["budget_share"]} for a in alerts]
    objective = f"{target:.4g} of requests"
    if traffic.latency_slo_ms and "latency" in metric.get("name", metric.get("id", "")):
        objective += f" faster than {traffic.latency_slo_ms:g} ms"
    derivation = (
        f"SLO: {objective} over {durations.format(period_s)}, so the error budget is {1 - target:.3g} of requests. "
        f"Burn rate = budget share spent x period / window: pages at {_sig(fast['burn_rate'], 3)} over "
        f"{durations.format(fast['long_window_s'])} (and its {durations.format(fast['short_window_s'])} short window, "
        f"{fast['budget_share']:.0%} of the budget), and at {_sig(alerts[1]['burn_rate'], 3)} over "
        f"{durations.format(alerts[1]['long_window_s'])}; opens a ticket at {_sig(slow['burn_rate'], 3)} over "
        f"{durations.format(slow['long_window_s'])} ({slow['budget_share']:.0%}). Both windows of a pair must exceed "
        f"the rate, so the alert stops soon after the burn does. The windows are the SRE Workbook's 30-day windows "
        f"scaled to the {durations.format(period_s)} period (whole minutes, at least "
        f"{durations.format(burn_rates.SHORTEST_SLO_WINDOW_S)}), so each pair spends the same share of the budget.")
    review = None
    within = burn_rates.pages_within_budget(alerts)
    if within:
        review = (f"the {durations.format(period_s)} SLO period is too short for paging: a page over "
                  f"{durations.format(within[0]['long_window_s'])} would fire at burn rate "
                  f"{_sig(within[0]['burn_rate'], 3)}, while the SLO is being met; use a longer period or a ticket")
    if budget_errors < 1:
        # Few requests per window: say how many failures it takes to page (SRE Workbook ch. 5: burn rate = error
        # ratio / (1 - SLO)), and flag only when a single failure does it.
        short, long = durations.format(fast["short_window_s"]), durations.format(fast["long_window_s"])
        long_requests = traffic.per_hour * fast["long_window_s"] / HOUR
        in_short = burn_rates.failures_to_exceed(fast["burn_rate"], requests, target)
        in_long = burn_rates.failures_to_fire(fast, traffic.per_hour, target)
        derivation += (
            f" At {_fmt(traffic.per_hour)} requests per hour the {short} short window holds {_fmt(requests)}: one "
            f"failure there is a burn rate of {_sig(burn_rates.single_failure_rate(requests, target), 3)}, and "
            f"{_sig(burn_rates.single_failure_rate(long_requests, target), 3)} in the {long} long window "
            f"({_fmt(long_requests)} requests); the page at {_sig(fast['burn_rate'], 3)} needs at least {in_short} "
            f"failure{'s' if in_short > 1 else ''} in the {short} window and {in_long} in the {long} window.")
        single = next((a for a in alerts if a["severity"] == "page"
                       and burn_rates.failures_to_fire(a, traffic.per_hour, target) == 1), None)
        if single is not None:
            held = traffic.per_hour * single["long_window_s"] / HOUR
            review = review or (
                f"only {_fmt(held)} requests in the {durations.format(single['long_window_s'])} window: a single "
                f"failure is a burn rate of {_sig(burn_rates.single_failure_rate(held, target), 3)} there, above the "
                f"page's {_sig(single['burn_rate'], 3)}, so one failure pages; consider a longer SLO period or a "
                f"request-count floor")
    return {"window": durations.format(fast["long_window_s"]), "warn": _sig(slow["burn_rate"]),
            "critical": _sig(fast["burn_rate"]), "review": review,
            "sizing": {"method": "error budget", "slo_target": target, "slo_period": durations.format(period_s),
                       "samples_per_window": round(traffic.per_hour * fast["long_window_s"] / HOUR),
                       "burn_rate_alerts": pairs,
                       "derivation": derivation}}


def _size_statistical(metric: dict[str, Any], traffic: Traffic, budget: Budget) -> dict[str, Any]:
    stat = _statistic(metric)
    critical = metric.get("critical")
    warn = metric.get("warn")
    target, longest = _target(traffic)
    notes: list[str] = []
    review = None
    fixed = metric.get("window", "auto") != "auto"
    if fixed:
        chosen = _with_floor(stat, _trial(stat, metric, traffic, budget, durations.parse(metric["window"])))
    else:
        trials: list[_Trial] = []
        for window in _windows(traffic, target):  # the shortest sound window, else the longest tried
            trials.append(_trial(stat, metric, traffic, budget, window))
            if trials[-1].sound:
                break
        chosen = _with_floor(stat, trials[-1])
        if chosen.sound and chosen.window > longest:
            review = (f"volume too low for change rate '{traffic.change_rate}': the shortest sound window is "
                      f"{durations.format(chosen.window)}, longer than the {durations.format(longest)} this change "
                      f"rate allows; a change would be seen late")
            notes.append(f"lengthened the window to {durations.format(chosen.window)}, past the "
                         f"{durations.format(longest)} the change rate allows"
                         + _why_longer(stat, metric, trials, chosen, traffic).replace(" so that", ", so that", 1))
        elif chosen.window > target:
            notes.append(f"lengthened the window from the {durations.format(target)} target for change rate "
                         f"'{traffic.change_rate}' to {durations.format(chosen.window)}"
                         + _why_longer(stat, metric, trials, chosen, traffic))
    if chosen.n < stat.min_samples():
        review = (f"only {_fmt(chosen.n)} samples per {durations.format(chosen.window)} window, fewer than the "
                  f"{stat.min_samples()} this statistic needs; the check is unreliable at this volume")
    if math.isinf(chosen.floor):
        review = "no traffic reaches this check (0 samples per window); it cannot be sized"
    elif fixed and critical is not None and chosen.floor > critical:
        # A window and threshold set by a person: explain, never change them.
        review = (f"the critical threshold {critical:g} is below the noise floor {_sig(chosen.floor, 3):g} at "
                  f"window {metric['window']}; expect false alarms")
        notes.append(f"kept the critical threshold {critical:g} as set, although it is below the noise floor "
                     f"{chosen.floor:.3g} at this window: expect false alarms")
    elif critical is not None and chosen.floor > critical:
        raised = round_up(chosen.floor)
        where = f"the {durations.format(chosen.window)} window" + ("" if chosen.sound else ", the longest tried")
        if material_raise(critical, raised):
            notes.append(f"raised the critical threshold from {critical:g} to {raised:g}, the noise floor at {where}")
            review = review or (f"volume too low: even a {durations.format(chosen.window)} window needs a threshold "
                                f"of {raised:g} instead of {critical:g}")
        else:
            notes.append(f"raised the critical threshold from {critical:g} to {raised:g}, the noise floor at {where} "
                         f"(a raise of {raised / critical - 1:.0%}, within the {RAISE_TOLERANCE:.0%} that needs no "
                         f"review)")
        critical = raised
    warn_alpha = warn_floor = None
    if warn is not None and chosen.n > 0:
        warn_alpha = min(0.5, budget.share(metric, "ticket") / chosen.evaluations)
        warn_floor = stat.floor(chosen.n, chosen.m, warn_alpha)
        if warn < warn_floor and fixed:
            notes.append(f"kept the warn threshold {warn:g} as set, below its noise floor {warn_floor:.3g}")
        elif warn < warn_floor:
            raised = round_up(warn_floor)
            if critical is not None and raised >= critical:
                notes.append(f"dropped the warn level {warn:g}: its noise floor {warn_floor:.3g} reaches the "
                             f"critical threshold")
                warn = None
            else:
                notes.append(f"raised the warn threshold from {warn:g} to {raised:g}, its noise floor")
                warn = raised
    crit_fa = warn_fa = None
    if chosen.n <= 0:
        return {"window": durations.format(chosen.window), "reference": metric.get("reference", "28d"),
                "warn": _sig(warn), "critical": _sig(critical), "review": review,
                "sizing": {"method": "noise floor", "samples_per_window": 0,
                           "derivation": "No items reach this check, so there is nothing to size."}}
    if critical is not None:
        crit_fa = stat.false_alarm(critical, chosen.n, chosen.m) * chosen.evaluations
    if warn is not None:
        warn_fa = stat.false_alarm(warn, chosen.n, chosen.m) * chosen.evaluations
    at_floor = stat.detectable(chosen.n, chosen.m, chosen.alpha, POWER)
    # What the alert itself catches: the true change whose observed value passes the critical threshold.
    detectable = stat.detectable_at(critical, chosen.n, chosen.m, POWER) if critical is not None else at_floor
    window_text = durations.format(chosen.window)
    reference = metric.get("reference", "28d") if fixed else reference_for(metric.get("reference", "28d"),
                                                                           chosen.window)
    if reference != metric.get("reference", "28d"):
        notes.append(f"lengthened the reference from {metric.get('reference')} to {reference}, "
                     f"{REFERENCE_MULTIPLE} windows")
    ref_text = (f"{_fmt(chosen.m)} reference samples ({reference})" if chosen.m is not None
                else f"a reference taken as exact ({reference})")
    kind = "page" if metric["severity"] == "page" else "ticket"
    share = budget.share(metric, kind)
    derivation = (
        f"{_fmt(traffic.per_hour)} items per hour give {_fmt(chosen.n)} samples per {window_text} window against "
        f"{ref_text}. The {kind} budget allows {share:.3g} false alarms per week for this check, evaluated "
        f"{_fmt(chosen.evaluations)} times a week, so alpha = {chosen.alpha:.3g} per evaluation. {stat.describe()}; "
        f"at this alpha the noise floor is {chosen.floor:.3g} ({stat.unit}); a true change of {at_floor:.3g} makes "
        f"the observed value exceed the floor in {POWER:.0%} of windows"
        + (f" (less than the floor itself: sampling noise adds to the observed {stat.unit}, on top of the true "
           f"change)" if at_floor < chosen.floor else "")
        + (f", and a true change of {detectable:.3g} makes it exceed the critical threshold {critical:g}, firing the "
           f"alert, in {POWER:.0%} of windows." if critical is not None else "."))
    if notes:
        derivation += " Stagewatch " + "; ".join(notes) + "."
    elif critical is not None:
        derivation += f" The suggested critical threshold {critical:g} is above the floor."
    delay = 2 * chosen.window
    derivation += (f" The export evaluates this check once per {window_text} on back-to-back windows, as the budget "
                   f"assumes (a sliding window evaluated every minute fires many times more often on noise); a "
                   f"change is judged in full by the end of the first whole window after it starts, so it is seen "
                   f"within {durations.format(delay)}")
    if metric.get("_label_delay"):
        delay += durations.parse(metric["_label_delay"])
        derivation += (f", plus the {metric['_label_delay']} label delay: the counters count labelled items when "
                       "their label arrives, so a change in predictions reaches the window one label delay later")
    derivation += "."
    sizing = {
        "method": "noise floor",
        "samples_per_window": round(chosen.n),
        "reference_samples": round(chosen.m) if chosen.m is not None else None,
        "evaluations_per_week": _sig(chosen.evaluations),
        "alpha": _sig(chosen.alpha, 3),
        "noise_floor": _sig(chosen.floor, 3),
        "warn_alpha": _sig(warn_alpha, 3),
        "warn_noise_floor": _sig(warn_floor, 3),
        "detectable_change": _sig(detectable, 3),
        "detectable_at_floor": _sig(at_floor, 3),
        "power": POWER,
        "expected_false_alarms_per_week": shown(crit_fa),
        "expected_false_warnings_per_week": shown(warn_fa),
        "evaluation": "once per window, back to back",
        "detection_delay": durations.format(delay),
        "derivation": derivation,
    }
    if metric.get("_label_delay"):
        sizing["evaluation_lag"] = metric["_label_delay"]
    return {"window": window_text, "reference": reference, "warn": _sig(warn), "critical": _sig(critical),
            "review": review, "sizing": _compact(sizing)}
