"""Counts from elsewhere: emitted SQL in every dialect, counts fed back with --counts, and hostile names.

The DuckDB dialect's emitted SQL is run in DuckDB itself (a real engine, outside stagewatch's own scan) and its
results fed back; the verdicts must equal a direct run's. The Spark side is in tests/test_spark.py.
"""

from __future__ import annotations

import csv
import json

import duckdb
import numpy as np
import pytest
import sqlglot
import yaml
from sqlglot import exp

from datagen import T0, data_args, write_declared_logs
from stagewatch.cli import main
from stagewatch.data import aggregates as ag
from stagewatch.data import scan
from stagewatch.data.counts import EmitEngine
from stagewatch.data.dialects import DIALECTS, render
from stagewatch.data.engines import DuckDBEngine, Location
from stagewatch.data.measures import Measure
from stagewatch.data.sources import Source
from test_data_check import COLD_STORE, REF_END

DAY = 86400.0
AT = "2026-03-15T18:00:00Z"  # inside the changed days of the logs below


def changed_logs(plan: dict, out) -> dict[str, str]:
    """The cold-store logs with a shift, NaN and infinity in temp_c, unseen rooms and an unknown risk from day 13:
    every kind of verdict and every edge case of the aggregates."""
    start = T0 + 13 * DAY
    changes = {("probe", "temp_c"): (start, lambda v: np.where(np.arange(v.size) % 7 == 0, np.nan,
                                                               np.where(np.arange(v.size) % 11 == 0, np.inf, v + 2))),
               ("probe", "room"): (start, lambda v: np.where(np.arange(v.size) % 5 == 0, "cellar", v)),
               ("spoilage_model", "risk"): (start, lambda v: np.where(np.arange(v.size) % 4 == 0, "unknown", v))}
    return write_declared_logs(plan, out, changes=changes)


@pytest.fixture
def checked(tmp_path, write):
    """A plan, its logs, a baseline and the direct run's result at AT."""
    description = write("pipeline.yaml", COLD_STORE)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(description), "-o", str(plan)]) == 0
    paths = changed_logs(yaml.safe_load(plan.read_text()), tmp_path / "logs")
    base = tmp_path / "base"
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(base)]) == 0
    direct = tmp_path / "direct.json"
    code = main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json",
                 "-o", str(direct)])
    return plan, paths, base, code, json.loads(direct.read_text())


def _tables(paths: dict[str, str]) -> list[str]:
    return [a for stage in paths for a in ("--table", f"{stage}=logs.{stage}")]


def _emit(plan, base, paths, dialect: str, out) -> str:
    assert main(["check", str(plan), "--baseline", str(base), *_tables(paths), "--at", AT,
                 "--emit-sql", dialect, "-o", str(out)]) == 0
    return out.read_text()


def test_the_direct_run_has_every_kind_of_verdict(checked):
    *_, code, doc = checked
    verdicts = {c["verdict"] for c in doc["checks"]}
    assert code == 4 and {"ok", "critical", "not_measured"} <= verdicts
    unseen = {c["id"]: c for c in doc["checks"]}["probe.input.room_unseen"]
    assert unseen["detail"]["unseen_values"][0][0] == "cellar"


@pytest.mark.parametrize("dialect", DIALECTS)
def test_emitted_sql_parses_in_its_dialect_and_reads_the_named_tables(checked, tmp_path, dialect):
    plan, paths, base, *_ = checked
    text = _emit(plan, base, paths, dialect, tmp_path / f"q.{dialect}.sql")
    statements = [s for s in sqlglot.parse(text, read=dialect) if s is not None]  # sqlglot's own parser
    assert len(statements) == text.count("\n-- query ") >= 4
    for statement in statements:
        assert isinstance(statement, exp.Union)  # the query, and a row that names it when the result is empty
        tables = {(t.db, t.name) for t in statement.find_all(exp.Table)}
        assert tables <= {("logs", "probe"), ("logs", "spoilage_model")} and tables
        assert statement.expression.expressions[-1].alias_or_name == "stagewatch_query"


def _run_in_duckdb(text: str, paths: dict[str, str], out_dir) -> list[str]:
    """Each emitted statement run as written by DuckDB over views named as the tables; one CSV per result."""
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute("CREATE SCHEMA logs")
    for stage, path in paths.items():
        con.execute(f"CREATE VIEW logs.{stage} AS SELECT * FROM read_parquet('{path}')")
    files = []
    for i, block in enumerate(text.split("\n-- query ")[1:]):
        statement = block.split("\n", 1)[1].rstrip().rstrip(";")
        cursor = con.execute(statement)
        names = [d[0] for d in cursor.description]
        path = out_dir / f"result{i}.csv"
        with open(path, "w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(names)
            writer.writerows(["" if v is None else repr(v) if isinstance(v, float) else v for v in row]
                             for row in cursor.fetchall())
        files.append(str(path))
    return files


def test_emitted_duckdb_sql_run_in_duckdb_and_fed_back_gives_the_direct_verdicts(checked, tmp_path, capsys):
    plan, paths, base, code, direct = checked
    text = _emit(plan, base, paths, "duckdb", tmp_path / "q.sql")
    files = _run_in_duckdb(text, paths, tmp_path)
    capsys.readouterr()
    fed = main(["check", str(plan), "--baseline", str(base), *_tables(paths),
                *[a for f in files for a in ("--counts", f)], "--at", AT, "--format", "json"])
    doc = json.loads(capsys.readouterr().out)
    assert fed == code
    assert doc["checks"] == direct["checks"] and doc["attribution"] == direct["attribution"]


def test_save_counts_then_counts_gives_identical_baseline_check_and_replay(checked, tmp_path, capsys):
    plan, paths, base, code, direct = checked
    saved = tmp_path / "cal.counts.json"
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(tmp_path / "b1"),
                 "--thresholds", "--save-counts", str(saved)]) == 0
    assert main(["calibrate", str(plan), "--counts", str(saved), "--to", REF_END, "-o", str(tmp_path / "b2"),
                 "--thresholds"]) == 0
    one = json.loads((tmp_path / "b1" / "baseline.json").read_text())["baseline"]
    two = json.loads((tmp_path / "b2" / "baseline.json").read_text())["baseline"]
    for stage in one["stages"]:
        one["stages"][stage].pop("sources"), two["stages"][stage].pop("sources")
    assert one == two

    counts = tmp_path / "check.counts.json"
    assert main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json",
                 "-o", str(tmp_path / "c1.json"), "--save-counts", str(counts)]) == code
    from stagewatch.resources import validator

    validator("counts").validate(json.loads(counts.read_text()))  # the documented schema
    capsys.readouterr()
    assert main(["check", str(plan), "--baseline", str(base), "--counts", str(counts), "--at", AT,
                 "--format", "json"]) == code
    assert json.loads(capsys.readouterr().out)["checks"] == direct["checks"]

    replayed = tmp_path / "replay.counts.json"
    period = ["--from", "2026-03-10T00:00:00Z", "--to", "2026-03-16T00:00:00Z", "--format", "json"]
    r1 = main(["replay", str(plan), "--baseline", str(base), *data_args(paths), *period, "-o",
               str(tmp_path / "r1.json"), "--save-counts", str(replayed)])
    r2 = main(["replay", str(plan), "--baseline", str(base), "--counts", str(replayed), *period, "-o",
               str(tmp_path / "r2.json")])
    assert r1 == r2
    assert json.loads((tmp_path / "r1.json").read_text()) == json.loads((tmp_path / "r2.json").read_text())


def test_counts_for_another_moment_are_refused_with_one_message(checked, tmp_path, capsys):
    plan, paths, base, *_ = checked
    counts = tmp_path / "check.counts.json"
    main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json",
          "-o", str(tmp_path / "c.json"), "--save-counts", str(counts)])
    capsys.readouterr()
    code = main(["check", str(plan), "--baseline", str(base), "--counts", str(counts), "--at",
                 "2026-03-15T12:00:00Z", "--format", "json"])
    err = capsys.readouterr().err
    assert code == 2 and "the counts have no result for query" in err and "Traceback" not in err
    bad = tmp_path / "bad.csv"
    bad.write_text("bucket,a0\n0,1\n")
    code = main(["check", str(plan), "--baseline", str(base), "--counts", str(bad), *_tables(paths), "--at", AT])
    err = capsys.readouterr().err
    assert code == 2 and "bad.csv:2:" in err and "stagewatch_query" in err


def test_emit_sql_without_at_or_with_files_says_what_it_needs(checked, capsys):
    plan, paths, base, *_ = checked
    assert main(["check", str(plan), "--baseline", str(base), *_tables(paths), "--emit-sql", "trino"]) == 2
    assert "--emit-sql needs --at" in capsys.readouterr().err
    assert main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT,
                 "--emit-sql", "trino"]) == 2
    assert "--table STAGE=NAME" in capsys.readouterr().err


# --- hostile names ----------------------------------------------------------------------------------------------

HOSTILE_COLUMNS = ['a"b', "c`d", "e;f", "g -- h", "i/*j*/", "k'l", "m\\n"]
HOSTILE_VALUES = ["it's", 'say "hi"', "x\\y", "a'; DROP TABLE t; --", "back`tick", "/* c */", "\\'"]


def hostile_table(n: int = 3000, seed: int = 5) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    table: dict[str, np.ndarray] = {}
    for i, name in enumerate(HOSTILE_COLUMNS):
        if i % 2 == 0:
            table[name] = np.round(rng.normal(0, 2, n), 1)
        else:
            table[name] = np.array(HOSTILE_VALUES, dtype=object)[rng.integers(0, len(HOSTILE_VALUES), n)]
    return table


def hostile_measures() -> list[tuple[Measure, dict]]:
    """A bin, a category, a range and an unseen check on every hostile column, with hostile literals."""
    out = []
    for i, name in enumerate(HOSTILE_COLUMNS):
        if i % 2 == 0:
            out.append((Measure(_metric("psi", {"column": name}), {name}), {"edges": [-1.0, 0.0, 1.0]}))
            out.append((Measure(_metric("proportion", {"column": name, "condition": "out_of_range",
                                                       "range": [-2, 2]}), {name}), {}))
        else:
            out.append((Measure(_metric("chi_square", {"column": name}), set()),
                        {"categories": HOSTILE_VALUES[:4]}))
            out.append((Measure(_metric("proportion", {"column": name, "condition": "unseen"}), set()),
                        {"categories_seen": HOSTILE_VALUES[:5]}))
    return out


def _metric(statistic: str, reads: dict) -> dict:
    return {"id": "s.input.x", "layer": "input", "statistic": statistic, "params": {}, "reads": reads}


def expected_counts(table: dict[str, np.ndarray], measure: Measure, ref: dict) -> list[int]:
    """The same counts by numpy on the raw values."""
    values = table[measure.column]
    if measure.statistic == "psi":
        return np.histogram(values, [-np.inf, *ref["edges"], np.inf])[0].tolist()
    if measure.statistic == "chi_square":
        known = ref["categories"]
        return [int((values == c).sum()) for c in known] + [int((~np.isin(values, known)).sum())]
    if measure.condition == "out_of_range":
        return [int(((values < -2) | (values > 2)).sum()), values.size]
    return [int((~np.isin(values, ref["categories_seen"])).sum()), values.size]


def hostile_aggregates() -> list[ag.Aggregate]:
    return [ag.Aggregate(f"{i}#{a.key}", a.expr) for i, (m, ref) in enumerate(hostile_measures())
            for a in m.aggregates(ref)]


def test_hostile_column_names_and_values_keep_their_meaning_in_every_dialect():
    query = ag.select("log", hostile_aggregates(), where=scan.period(0.0, 1e12))
    for dialect in DIALECTS:
        back = sqlglot.parse_one(render(query, dialect), read=dialect)  # one statement, not several
        columns = {c.name for c in back.find_all(exp.Column)} - {"__stagewatch_ts"}
        strings = {s.this for s in back.find_all(exp.Literal) if s.is_string}
        assert columns == set(HOSTILE_COLUMNS), dialect
        assert strings == set(HOSTILE_VALUES[:5]), dialect
        assert [t.name for t in back.find_all(exp.Table)] == ["log"]


def test_hostile_column_names_count_as_numpy_counts_in_duckdb(tmp_path):
    table = hostile_table()
    engine = DuckDBEngine()
    path = tmp_path / "hostile.parquet"
    engine.con.register("frame", {"ts": np.arange(3000, dtype=float), **table})
    cols = ", ".join('"' + k.replace('"', '""') + '"' for k in table)
    engine.con.execute(f"COPY (SELECT to_timestamp(ts) AS timestamp, {cols} FROM frame) TO '{path}' (FORMAT parquet)")
    source = engine.open("s", Location("data", str(path)), "timestamp", 0)
    counts = scan.run(engine, source, hostile_aggregates())[-1]
    for i, (m, ref) in enumerate(hostile_measures()):
        got = [int(counts[f"{i}#{a.key}"]) for a in m.aggregates(ref)]
        assert got == expected_counts(table, m, ref), (m.column, m.statistic)


def test_a_hostile_stage_or_table_name_stays_a_name_in_emitted_sql():
    engine = EmitEngine("spark")
    engine.baseline = {"stages": {"s\n; DROP TABLE x; --": {"column_types": {"timestamp": "TIMESTAMP"}}}}
    source = engine.open("s\n; DROP TABLE x; --", Location("table", "db.t`; DROP TABLE x; --"), "timestamp", 0)
    scan.time_range(engine, source)
    text = engine.sql()
    statements = [s for s in sqlglot.parse(text, read="spark") if s is not None]
    assert len(statements) == 1
    [table] = list(statements[0].find_all(exp.Table))
    assert (table.db, table.name) == ("db", "t`; DROP TABLE x; --")
    assert isinstance(source, Source)


def test_engine_spark_without_pyspark_says_how_to_install_it(checked, monkeypatch, capsys):
    import sys

    plan, paths, base, *_ = checked
    monkeypatch.setitem(sys.modules, "pyspark", None)  # as if not installed: importing it raises ImportError
    monkeypatch.setitem(sys.modules, "pyspark.sql", None)
    assert main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--engine", "spark"]) == 2
    assert "pip install 'stagewatch[spark]'" in capsys.readouterr().err


def test_a_long_duckdb_scan_reports_how_far_it_got(monkeypatch):
    from stagewatch.data import engines

    monkeypatch.setattr(engines, "PROGRESS_AFTER_S", 0.05)
    engine = DuckDBEngine()
    engine.con.execute("CREATE VIEW big AS SELECT range AS x, CAST(range AS DOUBLE) AS __stagewatch_ts "
                       "FROM range(150000000)")
    source = Source(stage="s", pattern="big", paths=[], view="big", columns={"x": "BIGINT"}, time_column="x")
    seen: list[float] = []
    engine.on_progress = seen.append
    odd = ag.Aggregate("odd", ag.count_if(exp.EQ(this=exp.Mod(this=ag.col("x"), expression=ag.lit(7)),
                                                   expression=ag.lit(1))))
    counts = scan.run(engine, source, [odd])[-1]
    assert counts["odd"] == len(range(1, 150000000, 7))  # Python's own count of x % 7 == 1
    assert seen and all(0 <= s <= 100 for s in seen) and seen == sorted(seen)
