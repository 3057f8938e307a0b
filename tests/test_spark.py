"""The Spark engine against the DuckDB engine on the same Parquet files, in a real local Spark session.

One session per module (``local[2]``, bounded by the timeout marks). The reference is DuckDB's scan of the same
files (and, for hostile names, numpy on the raw values): counts must be equal query by query, integer counts
exactly, float sums and quantiles to 1e-12 relative (Spark adds doubles in another order), and verdicts equal.
"""

from __future__ import annotations

import json
import math

import duckdb
import numpy as np
import pytest
import yaml

from datagen import data_args
from stagewatch.cli import main
from stagewatch.data import scan
from stagewatch.data.engines import Location
from test_data_check import COLD_STORE, REF_END
from test_engines import AT, changed_logs, expected_counts, hostile_aggregates, hostile_measures, hostile_table

pytest.importorskip("pyspark", reason="`make test` installs the spark extra")
pytestmark = [pytest.mark.slow, pytest.mark.timeout(900)]
PERIOD = ["--from", "2026-03-12T00:00:00Z", "--to", "2026-03-17T00:00:00Z"]  # runs past the logs: empty windows
EMPTY_AT = "2026-03-20T00:00:00Z"


@pytest.fixture(scope="module")
def spark(tmp_path_factory):
    from pyspark.sql import SparkSession

    warehouse = tmp_path_factory.mktemp("spark-warehouse")
    session = (SparkSession.builder.master("local[2]").appName("stagewatch-tests")
               .config("spark.ui.enabled", "false").config("spark.ui.showConsoleProgress", "false")
               .config("spark.sql.shuffle.partitions", "2").config("spark.sql.warehouse.dir", str(warehouse))
               .getOrCreate())
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()


@pytest.fixture(scope="module")
def logs(tmp_path_factory):
    """The generated cold-store logs (tests/datagen.py, as the DuckDB tests use) with every edge case: NaN and
    infinity, NULL numbers and categories, values on the reference's bin edges (temp_c in steps of 0.5, so the
    quantile edges are values of the data), unseen and unknown categories; a plan and a DuckDB baseline."""
    root = tmp_path_factory.mktemp("spark-logs")
    (root / "pipeline.yaml").write_text(COLD_STORE)
    plan = root / "plan.yaml"
    assert main(["propose", str(root / "pipeline.yaml"), "-o", str(plan)]) == 0
    paths = changed_logs(yaml.safe_load(plan.read_text()), root / "raw")
    con = duckdb.connect()
    out = {}
    for stage, path in paths.items():
        target = root / f"{stage}.parquet"
        con.execute(f"""COPY (SELECT * REPLACE (
            CASE WHEN row_number() OVER () % 13 = 0 THEN NULL ELSE round(temp_c * 2) / 2 END AS temp_c,
            CASE WHEN row_number() OVER () % 17 = 0 THEN NULL ELSE room END AS room)
            FROM read_parquet('{path}')) TO '{target}' (FORMAT parquet)""")
        out[stage] = str(target)
    base = root / "base"
    assert main(["calibrate", str(plan), *data_args(out), "--to", REF_END, "-o", str(base)]) == 0
    return plan, out, base, root


def _results(path) -> dict[str, list]:
    doc = json.loads(open(path).read())
    return {r["query"]: sorted(r["rows"], key=lambda row: [str(v) for v in row]) for r in doc["results"]}


def _same(a, b) -> bool:
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    if isinstance(a, float) or isinstance(b, float):
        if a is None or b is None:
            return a is b
        return math.isclose(float(a), float(b), rel_tol=1e-12, abs_tol=1e-9)
    return a == b


def _both(args: list[str], tmp_path, name: str) -> tuple[int, int, dict, dict]:
    one, two = tmp_path / f"{name}.duckdb.json", tmp_path / f"{name}.spark.json"
    a = main([*args, "--save-counts", str(one)])
    b = main([*args, "--engine", "spark", "--save-counts", str(two)])
    return a, b, _results(one), _results(two)


def _integers_exact(a: dict, b: dict) -> None:
    for key in a:
        for row_a, row_b in zip(a[key], b[key]):
            for x, y in zip(row_a, row_b):
                if isinstance(x, int) and not isinstance(x, bool):
                    assert x == int(y), key


def test_spark_counts_equal_duckdb_counts_for_check_and_replay(spark, logs, tmp_path):
    plan, paths, base, _ = logs
    for at in (AT, EMPTY_AT):
        args = ["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", at, "--format", "json",
                "-o", str(tmp_path / f"out-{at[:10]}.json")]
        a, b, counts_a, counts_b = _both(args, tmp_path, f"check-{at[:10]}")
        assert a == b
        assert counts_a.keys() == counts_b.keys() and len(counts_a) >= 4
        assert all(_same(counts_a[k], counts_b[k]) for k in counts_a)
        _integers_exact(counts_a, counts_b)
    args = ["replay", str(plan), "--baseline", str(base), *data_args(paths), *PERIOD, "--format", "json",
            "-o", str(tmp_path / "replay.json")]
    a, b, counts_a, counts_b = _both(args, tmp_path, "replay")
    assert a == b and counts_a.keys() == counts_b.keys()
    assert all(_same(counts_a[k], counts_b[k]) for k in counts_a)
    _integers_exact(counts_a, counts_b)


def test_an_injected_change_replays_alike_on_spark(spark, logs, tmp_path):
    """replay --inject on Spark: the same rows picked (the draw is integer arithmetic both engines compute), so
    the same counts query by query and the same detection."""
    plan, paths, base, _ = logs
    change = "probe.temp_c=missing:0.4@2026-03-13T00:00:00Z"
    args = ["replay", str(plan), "--baseline", str(base), *data_args(paths), *PERIOD, "--format", "json",
            "--inject", change, "-o", str(tmp_path / "inject.json")]
    a, b, counts_a, counts_b = _both(args, tmp_path, "inject")
    assert a == b and counts_a.keys() == counts_b.keys()
    assert all(_same(counts_a[k], counts_b[k]) for k in counts_a)
    _integers_exact(counts_a, counts_b)


def test_spark_verdicts_equal_duckdb_verdicts(spark, logs, tmp_path, capsys):
    plan, paths, base, _ = logs
    docs = []
    for engine in ("duckdb", "spark"):
        capsys.readouterr()
        code = main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json",
                     "--engine", engine])
        docs.append((code, json.loads(capsys.readouterr().out)))
    (code_a, a), (code_b, b) = docs
    assert code_a == code_b == 4
    assert [(c["id"], c["verdict"], c["n"], c["m"]) for c in a["checks"]] == \
        [(c["id"], c["verdict"], c["n"], c["m"]) for c in b["checks"]]
    assert all(_same(x["value"], y["value"]) for x, y in zip(a["checks"], b["checks"]))
    assert a["attribution"] == b["attribution"]


def test_a_baseline_calibrated_on_spark_equals_duckdbs(spark, logs, tmp_path):
    plan, paths, base, _ = logs
    assert main(["calibrate", str(plan), *data_args(paths), "--to", REF_END, "-o", str(tmp_path / "b"),
                 "--engine", "spark"]) == 0
    one = json.loads((base / "baseline.json").read_text())["baseline"]
    two = json.loads((tmp_path / "b" / "baseline.json").read_text())["baseline"]
    edges = [(stage, check, key) for stage in one["stages"] for check, ref in one["stages"][stage]["checks"].items()
             for key in ("edges", "edge") if key in ref]
    assert len(edges) >= 2  # quantile edges are exact order statistics interpolated on the driver: the same bits
    for stage, check, key in edges:
        assert one["stages"][stage]["checks"][check][key] == two["stages"][stage]["checks"][check][key], check
    for stage in one["stages"]:
        a, b = one["stages"][stage], two["stages"][stage]
        assert a.keys() == b.keys()
        for key in a:
            assert _same(json.loads(json.dumps(a[key])), json.loads(json.dumps(b[key]))) or \
                _close_dicts(a[key], b[key]), (stage, key)


def _close_dicts(a, b) -> bool:
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_close_dicts(a[k], b[k]) for k in a)
    return _same(a, b)


def test_a_catalog_table_reads_as_its_files(spark, logs, tmp_path, capsys):
    plan, paths, base, _ = logs
    spark.sql("CREATE DATABASE IF NOT EXISTS logs")
    for stage, path in paths.items():
        spark.sql(f"CREATE TABLE IF NOT EXISTS logs.{stage} USING parquet LOCATION '{path}'")
    capsys.readouterr()
    tables = [a for stage in paths for a in ("--table", f"{stage}=logs.{stage}")]
    code = main(["check", str(plan), "--baseline", str(base), *tables, "--at", AT, "--format", "json",
                 "--engine", "spark"])
    from_table = json.loads(capsys.readouterr().out)
    main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json"])
    direct = json.loads(capsys.readouterr().out)
    assert code == 4
    assert [(c["id"], c["verdict"], c["n"]) for c in from_table["checks"]] == \
        [(c["id"], c["verdict"], c["n"]) for c in direct["checks"]]


def test_emitted_spark_sql_run_in_spark_and_fed_back_gives_the_direct_verdicts(spark, logs, tmp_path, capsys):
    plan, paths, base, _ = logs
    for stage, path in paths.items():
        spark.read.parquet(path).createOrReplaceTempView(f"emitted_{stage}")
    tables = [a for stage in paths for a in ("--table", f"{stage}=emitted_{stage}")]
    sql = tmp_path / "q.sql"
    assert main(["check", str(plan), "--baseline", str(base), *tables, "--at", AT, "--emit-sql", "spark",
                 "-o", str(sql)]) == 0
    files = []
    spark.conf.set("spark.sql.session.timeZone", "UTC")  # as the emitted SQL's header asks
    for i, block in enumerate(sql.read_text().split("\n-- query ")[1:]):
        statement = block.split("\n", 1)[1].rstrip().rstrip(";")
        rows = [row.asDict() for row in spark.sql(statement).collect()]
        path = tmp_path / f"result{i}.json"
        path.write_text(json.dumps(rows))
        files += ["--counts", str(path)]
    capsys.readouterr()
    code = main(["check", str(plan), "--baseline", str(base), *tables, *files, "--at", AT, "--format", "json"])
    fed = json.loads(capsys.readouterr().out)
    main(["check", str(plan), "--baseline", str(base), *data_args(paths), "--at", AT, "--format", "json"])
    direct = json.loads(capsys.readouterr().out)
    assert code == 4
    assert [(c["id"], c["verdict"], c["n"], c["m"]) for c in fed["checks"]] == \
        [(c["id"], c["verdict"], c["n"], c["m"]) for c in direct["checks"]]
    assert all(_same(x["value"], y["value"]) for x, y in zip(fed["checks"], direct["checks"]))


def test_hostile_column_names_count_as_numpy_counts_in_spark(spark, tmp_path):
    from stagewatch.data.spark import SparkEngine

    table = hostile_table()
    con = duckdb.connect()
    con.register("frame", {"ts": np.arange(3000, dtype=float), **table})
    cols = ", ".join('"' + k.replace('"', '""') + '"' for k in table)
    path = tmp_path / "hostile.parquet"
    con.execute(f"COPY (SELECT to_timestamp(ts) AS timestamp, {cols} FROM frame) TO '{path}' (FORMAT parquet)")
    engine = SparkEngine(spark)
    source = engine.open("s", Location("data", str(path)), "timestamp", 0)
    counts = scan.run(engine, source, hostile_aggregates())[-1]
    for i, (m, ref) in enumerate(hostile_measures()):
        got = [int(counts[f"{i}#{a.key}"]) for a in m.aggregates(ref)]
        assert got == expected_counts(table, m, ref), (m.column, m.statistic)
