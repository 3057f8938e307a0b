"""`explain`: the derivation told for the metric as it is now (proposed, or carrying reviewer edits), and the
sentence about the true change that clears the noise floor checked by simulating the PSI the check computes."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
import yaml
from scipy import optimize
from scipy import stats as st

from conftest import SMALL
from stagewatch.cli import main

METRIC = "scorer.output.score_drift"  # a PSI check over 10 bins


def _explain(plan, capsys) -> str:
    capsys.readouterr()
    assert main(["explain", str(plan), METRIC]) == 0
    return " ".join(capsys.readouterr().out.split())


def _set_critical(plan, value: float) -> None:
    data = yaml.safe_load(plan.read_text())
    metric = next(m for s in data["stages"] for m in s["metrics"] if m["id"] == METRIC)
    metric["critical"] = value
    plan.write_text(yaml.safe_dump(data, sort_keys=False))


def test_a_critical_threshold_set_in_review_is_not_called_suggested(write, tmp_path, capsys):
    source, plan = write("p.yaml", SMALL), tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    assert "The suggested critical threshold 0.25 is above the floor." in _explain(plan, capsys)
    _set_critical(plan, 0.3)  # the reviewer's edit, not yet sized: the derivation still tells of 0.25
    said = _explain(plan, capsys)
    assert "edited after this was worked out" in said and "`stagewatch propose` sizes the edited ones" in said
    assert main(["propose", str(source), "-o", str(plan)]) == 0  # merged: the edit stands and is sized
    said = _explain(plan, capsys)
    assert "The critical threshold 0.3, set in review, is above the floor." in said, said
    assert "suggested" not in said and "edited after" not in said


def _psi_true(eps: float) -> float:
    # Reference shares 0.1 in each of 10 bins; the window's are 0.1 (1 + eps) and 0.1 (1 - eps) in turn.
    return 0.5 * eps * math.log((1 + eps) / (1 - eps))


def _share_above(threshold: float, true_psi: float, n: int, m: int, rng: np.random.Generator) -> float:
    """Share of simulated windows whose observed PSI (the usual formula, window against reference counts)
    exceeds ``threshold`` when the true PSI is ``true_psi``."""
    eps = optimize.brentq(lambda e: _psi_true(e) - true_psi, 0.0, 0.99)
    q = np.full(10, 0.1)
    p = q * (1 + eps * np.tile([1.0, -1.0], 5))
    draws = 20_000
    window = rng.multinomial(n, p, size=draws) / n
    reference = rng.multinomial(m, q, size=draws) / m
    observed = np.sum((window - reference) * np.log(window / reference), axis=1)
    return float(np.mean(observed > threshold))


def test_the_true_change_that_clears_the_floor_does_so_in_80_percent_of_windows(write, tmp_path, capsys):
    """A loose budget gives a loose alpha, where the true PSI that clears the floor is below the floor (noise only
    adds to an observed PSI): the wording says so, and the numbers it states hold when the PSI is simulated."""
    source = write("p.yaml", SMALL.replace("context: business", "context: business\nfalse_alarms_per_week: 1000\n"
                                            "false_tickets_per_week: 1000"))
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    said = _explain(plan, capsys)
    found = re.search(r"the noise floor is (\S+) \(PSI\); a true change of (\S+) makes the observed value exceed "
                      r"the floor in 80% of windows \(less than the floor itself: sampling noise adds to the "
                      r"observed PSI, on top of the true change\), and a true change of (\S+) makes it exceed the "
                      r"critical threshold (\S+), firing the alert, in 80% of windows\.", said)
    assert found, said
    floor, at_floor, at_critical, critical = (float(found.group(i)) for i in range(1, 5))
    assert at_floor < floor
    sizing = next(m for s in yaml.safe_load(plan.read_text())["stages"] for m in s["metrics"]
                  if m["id"] == METRIC)["sizing"]
    n, m = sizing["samples_per_window"], sizing["reference_samples"]
    rng = np.random.default_rng(20261202)
    # Simulated multinomial windows (numpy): 80% power within the spread of the chi-square approximation, the
    # band tests/test_stats.py holds every statistic to.
    assert 0.75 <= _share_above(floor, at_floor, n, m, rng) <= 0.85
    assert 0.75 <= _share_above(critical, at_critical, n, m, rng) <= 0.85
    # The same claim in scipy's non-central chi-square law: n_eff PSI ~ ncx2(9, n_eff PSI_true).
    n_eff = n * m / (n + m)
    # (the stated figures are rounded to 3 significant digits)
    assert st.ncx2.sf(floor * n_eff, 9, at_floor * n_eff) == pytest.approx(0.8, abs=0.02)
