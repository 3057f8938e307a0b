"""Which stage moved first, on the packhouse demo's own logs: the injected gate change, two independent changes
on separate branches, and a change that appears only after a hand-off."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pytest

from stagewatch.data.check import run_check
from stagewatch.demo import run_demo
from stagewatch.demo_logs import CHANGE, iso

pytestmark = pytest.mark.slow  # the whole demo: logs, plan, baseline


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    _, result = run_demo(str(out))
    return out, result


def _data(out: Path) -> dict[str, str]:
    return {p.stem: str(p) for p in sorted((out / "logs").glob("*.parquet"))}


def _rewrite(source: str, target: Path, column: str, expression: str, since: float) -> str:
    """Copy a log, replacing ``column`` by ``expression`` from ``since`` on (our own SQL, fixed in the test)."""
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"COPY (SELECT * REPLACE (CASE WHEN timestamp >= to_timestamp({since}) THEN {expression} "
                f"ELSE {column} END AS {column}) FROM '{source}') TO '{target}' (FORMAT parquet)")
    return str(target)


def test_the_demo_names_the_retuned_gate_as_the_origin(demo):
    _, result = demo
    first = result.attribution[0]
    assert first["stage"] == "frame_gate" and first["where"] == "output"
    assert len(result.attribution) == 1
    below = [c["stage"] for c in first["consequences"]]
    assert below[:2] == ["variety_tagger", "blemish_scorer"] and "grade_assigner" in below
    assert "line_camera" not in below  # upstream of the gate: quiet


def test_two_independent_changes_on_separate_branches_give_two_origins(demo, tmp_path):
    out, _ = demo
    data = _data(out)
    since = CHANGE - 2 * 86400  # before the gate is retuned
    data["load_cell"] = _rewrite(data["load_cell"], tmp_path / "lc.parquet", "weight_g", "weight_g + 60", since)
    ga = _rewrite(data["grade_assigner"], tmp_path / "ga1.parquet", "weight_g", "weight_g + 60", since)
    unknown = "CASE WHEN hash(record_id) % 5 = 0 THEN 'unknown' ELSE variety END"
    data["variety_tagger"] = _rewrite(data["variety_tagger"], tmp_path / "vt.parquet", "variety",
                                      unknown.replace("record_id", "confidence"), since)
    data["grade_assigner"] = _rewrite(ga, tmp_path / "ga2.parquet", "variety", unknown, since)
    result = run_check(str(out / "plan.yaml"), str(out / "baseline"), data, at=iso(CHANGE - 10 * 3600))  # Wednesday 20:00, a busy hour
    origins = {g["stage"]: g for g in result.attribution}
    assert set(origins) == {"variety_tagger", "load_cell"}
    assert origins["load_cell"]["where"] == "input"
    for group in origins.values():
        assert "grade_assigner" in [c["stage"] for c in group["consequences"]]


def test_a_change_only_after_the_hand_off_is_placed_on_the_hand_off(demo, tmp_path):
    out, _ = demo
    data = _data(out)
    since = CHANGE - 2 * 86400
    # a join upstream of grade_assigner starts delivering blemish scores on a 0-100 scale
    data["grade_assigner"] = _rewrite(data["grade_assigner"], tmp_path / "ga.parquet", "blemish_score",
                                      "blemish_score * 0.5 + 0.4", since)
    result = run_check(str(out / "plan.yaml"), str(out / "baseline"), data, at=iso(CHANGE - 10 * 3600))  # Wednesday 20:00, a busy hour
    [group] = result.attribution
    assert group["where"] == "hand-off"
    assert group["origin"] == "blemish_scorer -> grade_assigner"
    verdicts = {r.id: r.verdict for r in result.rows}
    assert verdicts["blemish_scorer.output.score_drift"] == "ok"  # the producer's side is quiet


def test_the_demo_writes_its_check_reports_beside_the_plan(demo):
    out, result = demo
    assert (out / "check.md").read_text().count("| ") > 50
    assert '"attribution"' in (out / "check.json").read_text()
    assert result.counts()["critical"] >= 1
