"""The fast paths give what the general ones give: the one-pass YAML representer against PyYAML's own, the cached
resolver against PyYAML's loader, sizing shared among processes against sizing in one, and binomial tails
evaluated once per distinct count against scipy on every point."""

from __future__ import annotations

import gc
import math
import random
import sys
from pathlib import Path

import numpy as np
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats as scipy_stats

from conftest import SMALL
from stagewatch import cli, fanout, tails, yamlio
from stagewatch.plan import compose, dump
from stagewatch.spec import load_pipeline

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))
import bench_plan  # noqa: E402  (the benchmark's generated pipelines)


class _PyYAML(yaml.CSafeDumper):
    """PyYAML's safe representer on libyaml's emitter, with the same text rule as ours: the reference output
    (what the plan dumper wrote before the one-pass representer)."""


_PyYAML.add_representer(str, yamlio._str_presenter)

_texts = st.one_of(st.text(max_size=30), st.sampled_from(
    ["yes", "No", "~", "null", "1e3", "0x1F", "1:30", "2026-12-02", "-.inf", ".nan", "a: b", "- x", "#c", "'q'",
     "line one\nline two", "trailing\n", " lead", "é ü ☃", "", "*alias", "&anchor", "!tag", "%", "@", "`"]))
_scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**20, 10**20), _texts,
                     st.floats(allow_nan=True, allow_infinity=True), st.sampled_from([1e17, 1e-05, -0.0, 5e-324]))


def _nested(scalars):
    return st.recursive(scalars, lambda inner: st.one_of(
        st.lists(inner, max_size=4), st.dictionaries(_texts, inner, max_size=4)), max_leaves=40)


_documents = _nested(_scalars)
# What our loader accepts: integers of at most 18 digits, finite numbers (yamlio refuses the rest, by design).
_readable = _nested(st.one_of(st.none(), st.booleans(), st.integers(-10**17, 10**17), _texts,
                              st.floats(allow_nan=False, allow_infinity=False)))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_documents)
def test_one_pass_representer_writes_what_pyyaml_writes(data):
    reference = yaml.dump(data, Dumper=_PyYAML, sort_keys=False, default_flow_style=False, width=110,
                          allow_unicode=True)
    assert yamlio.dump(data) == reference


def test_shared_objects_are_written_with_pyyaml_anchors():
    shared = {"a": [1, 2]}
    data = {"first": shared, "second": shared, "list": [shared]}
    text = yamlio.dump(data)
    assert "&id001" in text and "*id001" in text  # PyYAML's anchor names
    assert text == yaml.dump(data, Dumper=_PyYAML, sort_keys=False, default_flow_style=False, width=110,
                             allow_unicode=True)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_readable)
def test_cached_resolver_reads_what_pyyaml_reads(data):
    text = yaml.dump(data, Dumper=_PyYAML, sort_keys=False, default_flow_style=False, width=110,
                     allow_unicode=True)
    ours = yamlio.parse(text, "drawn.yaml").data
    theirs = yaml.load(text, Loader=yaml.SafeLoader)  # PyYAML's pure-Python loader, uncached
    assert repr(ours) == repr(theirs)  # repr: True and 1, 0.0 and -0.0 differ


def _written(tmp_path, description):
    path = tmp_path / "generated.yaml"
    path.write_text(yaml.safe_dump(description, sort_keys=False))
    return path


def test_sizing_on_two_processes_gives_the_plan_one_process_gives(tmp_path, monkeypatch):
    description = bench_plan.generate(90, seed=3)  # about 1,300 sized checks: above fanout.SMALLEST
    pipeline = load_pipeline(str(_written(tmp_path, description)))
    monkeypatch.setenv(fanout.WORKERS_VARIABLE, "1")
    alone = dump(compose(pipeline))
    tails.share_tail.cache_clear()
    tails.count_tail.cache_clear()
    monkeypatch.setenv(fanout.WORKERS_VARIABLE, "2")
    calls = []
    real = fanout.fan_out

    def counted(function, inputs, key=None):
        calls.append(len(inputs))
        return real(function, inputs, key)

    monkeypatch.setattr("stagewatch.plan.fan_out", counted)
    shared = dump(compose(pipeline))
    assert calls and calls[0] >= fanout.SMALLEST  # the pool was really used
    assert shared == alone


def test_fan_out_keeps_input_order_and_groups(monkeypatch):
    monkeypatch.setenv(fanout.WORKERS_VARIABLE, "2")
    inputs = list(range(fanout.SMALLEST + 7))
    random.Random(1).shuffle(inputs)
    assert fanout.fan_out(math.sqrt, inputs, key=lambda x: x % 13) == [math.sqrt(x) for x in inputs]
    monkeypatch.setenv(fanout.WORKERS_VARIABLE, "1")
    assert fanout.fan_out(math.sqrt, inputs) == [math.sqrt(x) for x in inputs]


def test_share_tail_equals_the_sum_over_every_reference_value():
    # The direct sum, evaluating scipy's binomial tail at each reference value (no reuse of equal counts).
    for t, n, m, p, direction in [(0.004, 3000, 2_000_000, 0.01, "both"), (0.02, 120, 80_000, 0.05, "above"),
                                  (0.001, 50_000, 60_000, 0.2, "below"), (0.03, 400, None, 0.1, "both")]:
        if m is None:
            ys, weights = np.array([p]), np.array([1.0])
        else:
            y, weights = tails._binomial_span(m, p)
            ys = y / m
        expected = 0.0
        if direction in ("above", "both"):
            expected += float(np.sum(weights * scipy_stats.binom.sf(np.floor(n * (t + ys) + tails._EPS), n, p)))
        if direction in ("below", "both"):
            expected += float(np.sum(weights * scipy_stats.binom.cdf(np.ceil(n * (ys - t) - tails._EPS) - 1, n, p)))
        tails.share_tail.cache_clear()
        assert tails.share_tail(t, n, m, p, direction) == min(1.0, expected)


def test_planning_commands_leave_the_cycle_collector_as_they_found_it(tmp_path):
    assert gc.isenabled()
    out = tmp_path / "plan.yaml"
    source = tmp_path / "p.yaml"
    source.write_text(SMALL)
    assert cli.main(["propose", str(source), "-o", str(out)]) == 0
    assert gc.isenabled()
    gc.disable()
    try:
        assert cli.main(["lint", str(out)]) in (0, 1)
        assert not gc.isenabled()
    finally:
        gc.enable()


def _verdict(check, text):
    root = yamlio._Loader(text).get_single_node()
    try:
        check(root, "doc.yaml")
    except Exception as exc:  # noqa: BLE001 - the verdict is the message, compared between the two walks
        return str(exc)
    return None


def test_the_short_walk_judges_documents_without_anchors_as_the_full_walk_does():
    documents = [
        "a: 1\nb: [1, 2, {c: .nan}]\n",  # NaN outside a sizing block
        "sizing:\n  detectable_change: .inf\n",  # allowed there
        "a: 1\nb: 2\na: 3\n",  # a duplicate key
        "n: 1234567890123456789012\n",  # an integer too long
        "x: " + "[" * 70 + "]" * 70 + "\n",  # too deep
        "- {a: 1, b: {c: [1, 2, 3]}}\n- text\n",
    ]
    for text in documents:
        assert _verdict(yamlio._check_plain_tree, text) == _verdict(yamlio._check_tree, text)
    assert _verdict(yamlio._check_tree, documents[2]) is not None  # the fixtures do reach the checks
