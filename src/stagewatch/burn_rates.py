"""SLO burn rates: the multiwindow, multi-burn-rate alert pairs of an SLO period."""

from __future__ import annotations

import math
from typing import TypedDict

# The SRE Workbook's recommended starting points for a 30-day SLO (ch. 5, table 5-8), as (severity, long window,
# budget share). Budget consumed = burn rate x long window / period.
BURN_RATE_WINDOWS = (("page", 3600, 0.02), ("page", 6 * 3600, 0.05), ("ticket", 3 * 86400, 0.10))
WORKBOOK_PERIOD_S = 30 * 86400
SHORT_WINDOW_FRACTION = 12  # the short window is 1/12 of the long one (table 5-8)
# A rate() over fewer than a few scrapes is noise; common practice keeps a range at least 4 scrape intervals long,
# and 5m covers that at scrape intervals up to 75s.
SHORTEST_SLO_WINDOW_S = 300


def burn_rate(budget_share: float, long_window_s: float, period_s: float) -> float:
    """Burn rate that spends ``budget_share`` of the error budget in ``long_window_s`` of an SLO ``period_s``.

    >>> round(burn_rate(0.02, 3600, 30 * 86400), 1)
    14.4
    """
    return budget_share * period_s / long_window_s


class BurnRateAlert(TypedDict):
    severity: str
    long_window_s: float
    short_window_s: float
    burn_rate: float
    budget_share: float


def _whole_minutes(seconds: float) -> int:
    return max(60, int(round(seconds / 60)) * 60)


def burn_rate_alerts(period_s: float) -> list[BurnRateAlert]:
    """Multiwindow, multi-burn-rate alert pairs for an SLO period.

    The windows scale with the period so that each pair still spends 2%, 5% and 10% of the budget at the
    Workbook's burn rates (14.4, 6 and 1): a 7-day SLO pages at 14.4 over 14m (short window 5m), a 28-day one over
    56m. Windows are whole minutes and at least ``SHORTEST_SLO_WINDOW_S``; the burn rate is then computed from the
    window actually used, so the budget share stays exact (a 1-day SLO pages at 5.76 over 5m, 2% of its budget).

    >>> [(int(a["long_window_s"]) // 60, a["burn_rate"]) for a in burn_rate_alerts(7 * 86400)]
    [(14, 14.4), (84, 6.0), (1008, 1.0)]
    """
    out: list[BurnRateAlert] = []
    for severity, long_30d, share in BURN_RATE_WINDOWS:
        long_s = max(SHORTEST_SLO_WINDOW_S, _whole_minutes(long_30d * period_s / WORKBOOK_PERIOD_S))
        short_s = min(long_s, max(SHORTEST_SLO_WINDOW_S, _whole_minutes(long_s / SHORT_WINDOW_FRACTION)))
        out.append({"severity": severity, "long_window_s": float(long_s), "short_window_s": float(short_s),
                    "burn_rate": round(burn_rate(share, long_s, period_s), 9), "budget_share": share})
    return out


def single_failure_rate(requests: float, target: float) -> float:
    """The burn rate one failure gives in a window of ``requests`` requests: its error ratio over the budget.

    The SRE Workbook (ch. 5) defines burn rate as the error ratio divided by ``1 - SLO``: one failure in 417
    requests at a 99.9% SLO is (1/417)/0.001, a burn rate of about 2.4.

    >>> round(single_failure_rate(417, 0.999), 2)
    2.4
    """
    return math.inf if requests <= 0 else 1 / (requests * (1 - target))


def failures_to_exceed(burn_rate: float, requests: float, target: float) -> int:
    """The fewest failures among ``requests`` whose error ratio exceeds ``burn_rate`` x (1 - target), as the
    exported rule's ``>`` asks.

    >>> failures_to_exceed(14.4, 5000, 0.999)  # more than 14.4 x 0.001 x 5,000 = 72
    73
    """
    return math.floor(round(burn_rate * (1 - target) * requests, 9)) + 1


def failures_to_fire(alert: BurnRateAlert, per_hour: float, target: float) -> int:
    """The fewest failures that fire ``alert``: both windows must exceed its rate, and failures inside the short
    window also lie in the long one, which holds more requests and so decides."""
    return failures_to_exceed(alert["burn_rate"], per_hour * alert["long_window_s"] / 3600, target)


def pages_within_budget(alerts: list[BurnRateAlert]) -> list[BurnRateAlert]:
    """The page pairs whose burn rate is 1 or less: they page while the SLO is being met."""
    return [a for a in alerts if a["severity"] == "page" and a["burn_rate"] <= 1]
