"""Safe with every file and every input: writes, lost updates, escaping, colliding ids and bounded inputs.

Outputs are judged by the tools that read them (promtool, amtool, a CommonMark parser, YAML), never by our own
escaping code; hostile inputs must end in exit 2 with a message, in bounded time.
"""

from __future__ import annotations

import json
import re
import os
import shutil
import signal
import stat
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
import yaml
from conftest import SMALL, stagewatch_command
from conftest import run_tool as _run
from conftest import tool as _tool

from stagewatch import plan as plan_mod
from stagewatch.cli import main
from stagewatch.safewrite import Snapshot, safe_write

ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture
def planned(tmp_path, write):
    """A pipeline description and its plan."""
    source = write("p.yaml", SMALL)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    return source, plan


# --- one safe write path ---------------------------------------------------------------------------------------


def test_a_symlinked_plan_is_written_through_and_stays_a_link(tmp_path, write):
    source = write("p.yaml", SMALL)
    real = tmp_path / "repo" / "plan.yaml"
    real.parent.mkdir()
    link = tmp_path / "plan.yaml"
    link.symlink_to(real)
    assert main(["propose", str(source), "-o", str(link)]) == 0
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert yaml.safe_load(real.read_text())["plan_version"] == 1
    # The merge reads through the link too: a reviewer's edit in the real file survives.
    real.write_text(real.read_text().replace("status: proposed", "status: accepted", 1))
    assert main(["propose", str(source), "-o", str(link)]) == 0
    assert link.is_symlink() and "status: accepted" in real.read_text()
    assert not [p for p in real.parent.iterdir() if p.name.endswith(".tmp")]


def test_a_fifo_at_the_target_is_refused_and_left_alone(planned, tmp_path, capsys):
    _, plan = planned
    fifo = tmp_path / "out.json"
    os.mkfifo(fifo)
    assert main(["export", str(plan), "--to", "checks", "-o", str(fifo)]) == 2  # would block if it opened it
    assert stat.S_ISFIFO(os.stat(fifo).st_mode)
    assert "named pipe" in capsys.readouterr().err


def test_a_device_node_at_the_target_is_refused_and_left_alone(planned, tmp_path, capsys):
    _, plan = planned
    node = tmp_path / "null"
    try:
        os.mknod(node, stat.S_IFCHR | 0o666, os.makedev(1, 3))  # a private /dev/null
    except PermissionError:
        pytest.skip("creating a device node needs root")
    assert main(["export", str(plan), "--to", "checks", "-o", str(node)]) == 2
    assert stat.S_ISCHR(os.stat(node).st_mode)
    assert "character device" in capsys.readouterr().err


@pytest.mark.parametrize("command", [
    ["export", "{plan}", "--to", "checks", "-o", "{plan}"],
    ["export", "{plan}", "--to", "checks", "-o", "{alias}"],  # the same file under another name (hard link)
    ["export", "{plan}", "--to", "prometheus", "-o", "{dir}"],  # the plan is DIR/alertmanager.yml
    ["propose", "{plan}", "-o", "{plan}"],
])
def test_an_input_is_never_written_over(planned, tmp_path, capsys, command):
    source, plan = planned
    plan_here = tmp_path / "alertmanager.yml"
    shutil.copy(plan, plan_here)
    os.link(plan_here, tmp_path / "alias.json")
    before = plan_here.read_bytes()
    argv = [a.format(plan=plan_here, alias=tmp_path / "alias.json", dir=tmp_path) for a in command]
    assert main(argv) == 2
    assert plan_here.read_bytes() == before
    assert "also an input" in capsys.readouterr().err
    assert not (tmp_path / "rules").exists()  # an export writes nothing when one file is refused


def test_render_refuses_to_write_over_a_plan_named_plan_md(planned, tmp_path, capsys):
    _, plan = planned
    md_plan = tmp_path / "plan.md"
    shutil.copy(plan, md_plan)
    before = md_plan.read_bytes()
    os.chdir(tmp_path)
    assert main(["render", "plan.md", "-o", "."]) == 2
    assert md_plan.read_bytes() == before and "also an input" in capsys.readouterr().err


def test_dash_writes_to_standard_output(planned, capsys):
    _, plan = planned
    assert main(["export", str(plan), "--to", "checks", "-o", "-"]) == 0
    checks = json.loads(capsys.readouterr().out)
    assert checks["pipeline"] == "tiny" and checks["checks"]
    assert main(["render", str(plan), "-o", "-"]) == 0
    assert capsys.readouterr().out.startswith("# Monitoring plan: tiny")
    assert main(["export", str(plan), "--to", "prometheus", "-o", "-"]) == 2


def test_the_temporary_file_is_removed_when_the_write_is_killed_with_sigterm(tmp_path):
    target = tmp_path / "plan.yaml"
    target.write_text("old\n")
    script = textwrap.dedent(f"""
        import os, time
        from stagewatch import safewrite
        def slow(source, target):  # stop just before the rename, with the temporary file written
            print("writing", flush=True)
            time.sleep(30)
        os.replace = slow
        safewrite.safe_write({str(target)!r}, "new\\n" * 1000000)
    """)
    proc = subprocess.Popen([sys.executable, "-c", script], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "writing"
    assert [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]  # the temporary file exists now
    proc.send_signal(signal.SIGTERM)
    assert proc.wait(timeout=20) != 0
    assert target.read_text() == "old\n"
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


def test_an_immutable_target_is_a_message_not_a_crash(planned, tmp_path, capsys):
    source, plan = planned
    chattr = shutil.which("chattr")
    if not chattr or _run(chattr, "+i", str(plan)).returncode != 0:
        pytest.skip("this file system does not support the immutable attribute")
    try:
        assert main(["propose", str(source), "-o", str(plan)]) == 2
        assert "cannot write here" in capsys.readouterr().err
        assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]
    finally:
        _run(chattr, "-i", str(plan))


# --- no lost update --------------------------------------------------------------------------------------------


def test_an_edit_saved_during_a_merge_is_kept_and_the_merge_refused(planned, monkeypatch, capsys):
    source, plan = planned
    edited = plan.read_text().replace("status: proposed", "status: accepted", 1)
    real_compose = plan_mod.compose

    def slow_compose(*args, **kwargs):  # a reviewer saves while the merge runs
        plan.write_text(edited)
        return real_compose(*args, **kwargs)

    monkeypatch.setattr(plan_mod, "compose", slow_compose)
    assert main(["propose", str(source), "-o", str(plan)]) == 2
    assert plan.read_text() == edited
    assert "changed after stagewatch read it" in capsys.readouterr().err


def test_two_proposes_on_one_plan_one_is_refused_and_nothing_is_lost(tmp_path, write, monkeypatch, capsys):
    """The second propose starts while the first is merging (the first's compose runs it), on another
    description; the second finishes first, so the first must not replace what the second wrote."""
    first = write("p.yaml", SMALL)
    second = write("q.yaml", SMALL.replace("volume_per_hour: 1000\n    latency_slo_ms",
                                           "volume_per_hour: 5000\n    latency_slo_ms"))
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(first), "-o", str(plan)]) == 0
    real_compose = plan_mod.compose
    calls = []

    def interleaved(*args, **kwargs):
        calls.append(1)
        if len(calls) == 1:
            monkeypatch.setattr(plan_mod, "compose", real_compose)
            assert main(["propose", str(second), "-o", str(plan)]) == 0
        return real_compose(*args, **kwargs)

    monkeypatch.setattr(plan_mod, "compose", interleaved)
    assert main(["propose", str(first), "-o", str(plan)]) == 2
    assert "volume_per_hour: 5000" in plan.read_text()  # the run that finished first is what stays


def test_two_concurrent_processes_never_lose_an_update(tmp_path, write):
    """Real processes: each propose either lands (and its change is on disk) or is refused with exit 2."""
    descriptions = [write(f"p{i}.yaml", SMALL.replace("volume_per_hour: 1000\n    latency_slo_ms",
                                                      f"volume_per_hour: {1000 + i}\n    latency_slo_ms"))
                    for i in range(2)]
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(descriptions[0]), "-o", str(plan)]) == 0
    procs = [subprocess.Popen([stagewatch_command(), "propose", str(d), "-o", str(plan)],
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for d in descriptions]
    codes = [p.wait(timeout=300) for p in procs]
    assert set(codes) <= {0, 2} and 0 in codes
    winner = yaml.safe_load(plan.read_text())["stages"][1]["volume_per_hour"]
    assert codes[winner - 1000] == 0  # the volume on disk belongs to a run that reported success
    for code, proc in zip(codes, procs):
        if code == 2:
            assert "changed after stagewatch read it" in proc.stderr.read()


def test_the_interview_refuses_to_replace_a_plan_changed_while_it_ran(planned, tmp_path, monkeypatch, capsys):
    _, plan = planned
    answers = tmp_path / "answers.yaml"
    answers.write_text("{}\n")  # every question takes its default: finish, merge
    edited = plan.read_text().replace("status: proposed", "status: rejected\n    note: by hand", 1)
    from stagewatch import interview_review

    real_review = interview_review.review

    def review_then_someone_saves(*args, **kwargs):
        real_review(*args, **kwargs)
        plan.write_text(edited)

    monkeypatch.setattr(interview_review, "review", review_then_someone_saves)
    assert main(["interview", str(plan), "--answers", str(answers)]) == 2
    assert plan.read_text() == edited
    assert "changed after stagewatch read it" in capsys.readouterr().err


def test_safe_write_refuses_when_the_snapshot_is_stale(tmp_path):
    target = tmp_path / "plan.yaml"
    target.write_text("a\n")
    snap = Snapshot.take(target)
    target.write_text("b\n")
    with pytest.raises(Exception, match="changed after"):
        safe_write(target, "c\n", expected=snap)
    assert target.read_text() == "b\n"


def test_a_duplicated_metric_id_is_refused_naming_both_lines(planned, capsys):
    source, plan = planned
    lines = plan.read_text().splitlines(keepends=True)
    first = next(i for i, line in enumerate(lines) if line.startswith("  - id: feed.software."))
    end = next(i for i in range(first + 1, len(lines)) if lines[i].startswith("  - id: "))
    block = lines[first:end]
    edited = "".join(lines[:end] + [b.replace("status: proposed", "status: accepted") for b in block]
                     + lines[end:])
    plan.write_text(edited)
    assert main(["propose", str(source), "-o", str(plan)]) == 2
    err = capsys.readouterr().err
    assert f"lines {first + 1} and {end + 1}" in err and plan.read_text() == edited


# --- ids that stay distinct --------------------------------------------------------------------------------------


def test_stage_ids_that_collide_once_normalised_are_refused_naming_both_lines(write, capsys):
    text = SMALL.replace("id: scorer", "id: load-cell").replace("id: feed", "id: load_cell").replace(
        "[feed]", "[load_cell]")
    assert main(["propose", str(write("p.yaml", text))]) == 2
    err = capsys.readouterr().err
    assert "'load_cell' (line 4) and 'load-cell' (line 12)" in err


def test_field_names_that_collide_in_alert_names_are_refused(write, capsys):
    text = SMALL.replace("      - {name: amount, type: numeric, range: [0, 100]}\n",
                         "      - {name: a_b, type: numeric}\n      - {name: a__b, type: numeric}\n")
    assert main(["propose", str(write("p.yaml", text))]) == 2
    assert "'a_b' (line 11) and 'a__b' (line 12) both become 'AB'" in capsys.readouterr().err


# --- escaping, judged by the tools that read the output --------------------------------------------------------


def test_template_text_in_owner_and_why_exports_and_passes_promtool_and_amtool(planned, tmp_path):
    source, _ = planned
    text = SMALL.replace("context: business", "context: business\nowner: '{{ $value }}'").replace(
        "    latency_slo_ms: 50\n", "    latency_slo_ms: 50\n    owner: 'team a'\n")
    plan = tmp_path / "hostile.yaml"
    assert main(["propose", str(Path(source).with_name("p2.yaml").write_text(text) and
                                 Path(source).with_name("p2.yaml")), "-o", str(plan)]) == 0
    data = yaml.safe_load(plan.read_text())
    data["stages"][0]["metrics"][0]["why"] = "value {{{ .Value }}} x"
    data["stages"][0]["metrics"][0].pop("fingerprint", None)
    plan.write_text(yaml.safe_dump(data, sort_keys=False))
    out = tmp_path / "out"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    rules = sorted((out / "rules").glob("*.yml"))
    check = _run(_tool("promtool"), "check", "rules", *map(str, rules))
    assert check.returncode == 0, check.stdout + check.stderr
    test = _run(_tool("promtool"), "test", "rules", *map(str, sorted((out / "tests").glob("*.yml"))))
    assert test.returncode == 0, test.stdout + test.stderr  # labels and annotations expand to the exact text
    am = _run(_tool("amtool"), "check-config", str(out / "alertmanager.yml"))
    assert am.returncode == 0, am.stdout + am.stderr
    config = yaml.safe_load((out / "alertmanager.yml").read_text())
    matchers = [m for route in config["route"]["routes"] for m in route["matchers"]]
    assert 'owner="{{ $value }}"' in matchers  # routing matches the owner as written


def test_owners_that_normalise_alike_get_distinct_receivers_amtool_accepts(write, tmp_path):
    text = SMALL.replace("context: business", "context: business\nowner: 'team a'").replace(
        "    latency_slo_ms: 50\n", "    latency_slo_ms: 50\n    owner: team-a\n").replace(
        "    volume_per_hour: 1000\n    inputs:", "    volume_per_hour: 1000\n    owner: stagewatch\n    inputs:")
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(write("p.yaml", text)), "-o", str(plan)]) == 0
    out = tmp_path / "out"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    config = yaml.safe_load((out / "alertmanager.yml").read_text())
    names = [r["name"] for r in config["receivers"]]
    assert len(names) == len(set(names))
    am = _run(_tool("amtool"), "check-config", str(out / "alertmanager.yml"))
    assert am.returncode == 0, am.stdout + am.stderr


HOSTILE_MARKDOWN = {
    "description": "```",
    "owner": "# APPROVED by security",
    "stage_description": "[x](javascript:alert(1)) <img src=x onerror=alert(1)> https://evil.example www.evil.example",
    "note": "a | b | c\n\n# heading\n<script>alert(1)</script>",
}


def markdown_problems(text: str, hostile: list[str]) -> list[str]:
    """What a CommonMark parser (markdown-it-py, with GFM tables and linkify off) finds that free text must not
    produce: raw HTML, links, headings or fences beyond the template's, table rows of the wrong width."""
    from markdown_it import MarkdownIt

    md = MarkdownIt("commonmark").enable("table")
    tokens = md.parse(text)
    problems = []
    for token in tokens:
        if token.type == "html_block":
            problems.append(f"raw HTML: {token.content!r}")
        if token.type == "fence" and token.info != "mermaid":
            problems.append(f"a code fence: {token.content[:40]!r}")
        for child in token.children or []:
            if child.type == "html_inline" and child.content == "<br>":
                continue  # the template's own line break in hand-off cells
            if child.type in ("html_inline", "link_open", "image"):
                problems.append(f"{child.type}: {child.attrs or child.content!r}")
    headings = [tokens[i + 1].content for i, t in enumerate(tokens) if t.type == "heading_open"]
    problems += [f"heading from free text: {h!r}" for h in headings if any(h and h in x for x in hostile)
                 and not h.startswith(("Monitoring plan", "`"))]
    widths: list[int] = []
    for i, t in enumerate(tokens):
        if t.type == "table_open":
            widths = []
        if t.type == "tr_open":
            cells = 0
            j = i + 1
            while tokens[j].type != "tr_close":
                cells += tokens[j].type in ("th_open", "td_open")
                j += 1
            widths.append(cells)
        if t.type == "table_close" and len(set(widths)) > 1:
            problems.append(f"table rows of widths {sorted(set(widths))}")
    return problems


def test_free_text_renders_as_text_in_a_commonmark_parser(write, tmp_path):
    pytest.importorskip("markdown_it")
    h = HOSTILE_MARKDOWN
    text = SMALL.replace("context: business", "context: business\ndescription: " + json.dumps(h["description"])
                         + "\nowner: " + json.dumps(h["owner"])).replace(
        "  - id: scorer\n", "  - id: scorer\n    description: " + json.dumps(h["stage_description"]) + "\n")
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(write("p.yaml", text)), "-o", str(plan)]) == 0
    data = yaml.safe_load(plan.read_text())
    data["stages"][1]["metrics"][0]["note"] = h["note"]
    data["stages"][1]["metrics"][0]["measure"] = "share | with | pipes"
    data["stages"][1]["metrics"][0].pop("fingerprint", None)
    plan.write_text(yaml.safe_dump(data, sort_keys=False))
    assert main(["render", str(plan), "-o", str(tmp_path / "review")]) == 0
    rendered = (tmp_path / "review" / "plan.md").read_text()
    assert markdown_problems(rendered, list(h.values())) == []
    # The check can fail: the same text unescaped is caught.
    assert markdown_problems("\n".join(h.values()), list(h.values()))


def test_explain_shows_escape_codes_and_bidi_overrides_instead_of_obeying_them(planned, capsys):
    _, plan = planned
    data = yaml.safe_load(plan.read_text())
    metric = data["stages"][1]["metrics"][0]
    metric["note"] = "ok \x1b[2J\x1b[31mred\u202etxt.exe"
    plan.write_text(yaml.safe_dump(data, sort_keys=False))
    assert main(["explain", str(plan), metric["id"]]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\u202e" not in out
    assert "\\x1b[2J" in out and "\\u202e" in out


# --- bounded inputs ----------------------------------------------------------------------------------------------


def _bounded(args: list[str], seconds: float = 60) -> tuple[int, str, float]:
    """Run the installed command with a time limit: a hang is a failure, not a stuck test run."""
    start = time.monotonic()
    proc = subprocess.run([stagewatch_command(), *args], capture_output=True, text=True, timeout=seconds)
    return proc.returncode, proc.stderr, time.monotonic() - start


ALIAS_BOMB = "a: &a [x, x, x, x, x, x, x, x, x]\n" + "".join(
    f"{chr(98 + i)}: &{chr(98 + i)} [*{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, "
    f"*{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}, *{chr(97 + i)}]\n" for i in range(9))


@pytest.mark.parametrize("text, message", [
    (ALIAS_BOMB, "aliases expand this document"),
    ("a: &a [*a]\n", "alias refers to a block that contains it"),
    ("a: " + "[" * 200 + "]" * 200 + "\n", "nested"),
    ("a:\n" + "".join("  " * (i + 1) + f"k{i}:\n" for i in range(100)) + "  " * 101 + "v: 1\n", "nested"),
    ("pipeline: x\nstages: " + "9" * 5001 + "\n", "an integer of 5001 digits"),
    ("a: 2020-13-45\n", "cannot be read"),
])
def test_hostile_yaml_stops_with_a_message_in_bounded_time(tmp_path, text, message):
    path = tmp_path / "p.yaml"
    path.write_text(text)
    for command in (["propose", str(path)], ["lint", str(path)]):
        code, err, seconds = _bounded(command)
        assert code == 2 and message in err, err
        assert seconds < 20


PIPELINE_NUMBERS = [("false_alarms_per_week", "context: business"), ("false_tickets_per_week", "context: business"),
                    ("volume_per_hour", None), ("latency_slo_ms", None), ("labelled_share", None),
                    ("slo_target", None)]


def _with(key: str, value: str) -> str:
    text = SMALL.replace("    latency_slo_ms: 50\n", "    latency_slo_ms: 50\n    labels: immediate\n"
                         "    labelled_share: 0.5\n    slo_target: 0.999\n")
    text = text.replace("context: business", "context: business\nfalse_alarms_per_week: 1\nfalse_tickets_per_week: 5")
    lines = text.splitlines()
    index = max(i for i, line in enumerate(lines) if line.strip().startswith(key + ":"))
    indent = lines[index][: len(lines[index]) - len(lines[index].lstrip())]
    lines[index] = f"{indent}{key}: {value}"
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("key", [k for k, _ in PIPELINE_NUMBERS])
@pytest.mark.parametrize("value", [".nan", ".inf", "-.inf", "1.0e+308", "1.0e-300", "9" * 5001])
def test_every_number_of_a_description_is_finite_and_in_range(write, key, value, capsys):
    assert main(["propose", str(write("p.yaml", _with(key, value)))]) == 2
    err = capsys.readouterr().err
    assert "p.yaml:" in err and "internal error" not in err


@pytest.mark.parametrize("key, value", [("label_delay", "99999999999999999999w"), ("slo_period", "1000000w"),
                                        ("run_every", "731d")])
def test_absurd_durations_are_refused(write, key, value, capsys):
    text = SMALL.replace("    serving: batch\n", "    serving: batch\n    run_every: 1h\n") if key == "run_every" else SMALL
    if key == "label_delay":
        text = text.replace("    latency_slo_ms: 50\n", "    latency_slo_ms: 50\n    labels: delayed\n"
                            f"    label_delay: {value}\n")
    elif key == "slo_period":
        text = text.replace("    latency_slo_ms: 50\n", f"    latency_slo_ms: 50\n    slo_period: {value}\n")
    else:
        text = text.replace("run_every: 1h", f"run_every: {value}")
    assert main(["propose", str(write("p.yaml", text))]) == 2
    assert "at most 730d" in capsys.readouterr().err


@pytest.mark.parametrize("key, value, message", [
    ("critical", ".inf", "not a finite number"), ("warn", ".nan", "not a finite number"),
    ("critical", "-1.0e+300", "from -1e12"), ("critical", "-0.5", "negative"),
    ("window", "100000w", "at most 730d"), ("reference", "99999999999d", "at most 730d"),
    ("params", "{bins: 1000000000}", "1000"),
])
def test_hostile_numbers_in_a_plan_stop_every_command_quickly(planned, capsys, key, value, message):
    source, plan = planned
    lines = plan.read_text().splitlines()
    start = next(i for i, line in enumerate(lines) if line.startswith("  - id: feed.input.amount_drift"))
    index = next(i for i in range(start, len(lines)) if lines[i].startswith(f"    {key}:"))
    if key == "params":
        lines[index + 1:index + 2] = []
    lines[index] = f"    {key}: {value}"
    plan.write_text("\n".join(lines) + "\n")
    code, err, seconds = _bounded(["propose", str(source), "-o", str(plan)])  # where `critical: .inf` looped
    assert code == 2 and message in err and seconds < 30, err
    for command in (["render", str(plan), "-o", str(plan.parent / "md")],
                    ["export", str(plan), "--to", "checks", "-o", "-"]):
        assert main(command) == 2
        assert message in capsys.readouterr().err
    assert main(["lint", str(plan)]) == 2  # lint lists what the schema refuses, and exits 2 as the others do
    assert "internal error" not in capsys.readouterr().err


@pytest.mark.parametrize("answers, message", [
    ("[1, 2]\n", "mapping of question keys"),
    ("pipeline.name: [1]\n", "pipeline.name"),
    ("pipeline.context: 5\n", "is not allowed"),
    ("pipeline.stage_count: lots\n", "whole number"),
    ("1: x\n", "not text"),
    ("draft_version: 1\nanswers: 5\n", "'answers' is a mapping"),
    ("draft_version: 1\noutput: ../../x.yaml\nanswers: {}\n", "outside the working directory"),
    ("draft_version: 1\noutput: [1]\nanswers: {}\n", "is a file name"),
])
def test_malformed_answers_and_drafts_are_refused(tmp_path, monkeypatch, capsys, answers, message):
    monkeypatch.chdir(tmp_path)
    path = tmp_path / "a.yaml"
    path.write_text(answers)
    flag = "--resume" if answers.startswith("draft_version") else "--answers"
    args = ["interview", flag, str(path)] + (["--answers", str(path)] if flag == "--resume" else [])
    assert main(args) == 2
    err = capsys.readouterr().err
    assert message in err and "internal error" not in err
    assert not (tmp_path.parent.parent / "x.yaml").exists()


# --- property: hostile free text through propose -> lint -> render -> export ------------------------------------

from hypothesis import HealthCheck, given, seed, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

PIECES = ["'", '"', "\\", "`", "```", "[", "]", "(", ")", "{", "}", "|", "-->", "%%", "<script>alert(1)</script>",
          "{{ $value }}", "{{{", "}}}", "{{ .Labels }}", "$value", "\n", "\n\n# x\n", "\u202e", "\u2066", "e\u0301",
          "\U0001f600", "x" * 300, "# APPROVED", "[a](javascript:alert(1))", "<img src=x onerror=y>", "* ", "1. ",
          "&amp;", "\\|", "=~", ",", ":", "@", "www.x.io", "http://x.io", "\t", "\x1b[31m", " "]
free_text = st.lists(st.sampled_from(PIECES), min_size=1, max_size=6).map("".join)
MERMAID_LINE = re.compile(r'^\s+s_[a-z0-9_]+(\[/"[^"]*"/\]|\{\{"[^"]*"\}\}|\(\["[^"]*"\]\)|\["[^"]*"\])$'
                          r'|^\s+s_[a-z0-9_]+ -->\|"[^"]*"\| s_[a-z0-9_]+$|^flowchart LR$')


@st.composite
def hostile_pipelines(draw):
    description = yaml.safe_load(SMALL)
    description["description"] = draw(free_text)
    description["owner"] = draw(free_text)
    for stage in description["stages"]:
        stage["description"] = draw(free_text)
        if draw(st.booleans()):
            stage["owner"] = draw(free_text)
    description["stages"][0]["inputs"][0]["description"] = draw(free_text)
    return description, draw(free_text), draw(free_text)


@seed(20240612)
@settings(max_examples=6, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=hostile_pipelines())
def test_hostile_free_text_survives_the_whole_flow_and_every_validator(tmp_path_factory, case):
    pytest.importorskip("markdown_it")
    description, note, measure = case
    work = tmp_path_factory.mktemp("hostile")
    source = work / "p.yaml"
    source.write_text(yaml.safe_dump(description, allow_unicode=True))
    plan = work / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    data = yaml.safe_load(plan.read_text())
    metric = next(m for m in data["stages"][1]["metrics"] if m["statistic"] != "burn_rate")
    metric.update(note=note, measure=measure, status="accepted")
    metric.pop("fingerprint", None)
    plan.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False))
    assert main(["propose", str(source), "-o", str(plan)]) == 0  # the merge keeps the text as written
    merged, _ = plan_mod.load_plan(str(plan))
    again = next(m for m in merged["stages"][1]["metrics"] if m["id"] == metric["id"])
    assert (again["note"], again["measure"]) == (note, measure)
    assert yaml.safe_load(plan.read_text()) == merged and merged["owner"] == description["owner"]
    assert main(["lint", str(plan)]) in (0, 1)
    assert main(["render", str(plan), "-o", str(work / "review")]) == 0
    rendered = (work / "review" / "plan.md").read_text()
    hostile = [description["description"], description["owner"], note, measure]
    assert markdown_problems(rendered, hostile) == []
    mermaid = rendered.split("```mermaid\n", 1)[1].split("```", 1)[0].splitlines()
    assert all(MERMAID_LINE.match(line) for line in mermaid), mermaid
    out = work / "out"
    assert main(["export", str(plan), "--to", "prometheus", "-o", str(out)]) == 0
    assert main(["export", str(plan), "--to", "checks", "-o", str(work / "checks.json")]) == 0
    checks = json.loads((work / "checks.json").read_text())
    assert any(c.get("measure") == measure for c in checks["checks"])
    rules = sorted(map(str, (out / "rules").glob("*.yml")))
    check = _run(_tool("promtool"), "check", "rules", *rules)
    assert check.returncode == 0, check.stdout + check.stderr
    test = _run(_tool("promtool"), "test", "rules", *sorted(map(str, (out / "tests").glob("scorer.*.yml"))))
    assert test.returncode == 0, test.stdout[-3000:] + test.stderr
    am = _run(_tool("amtool"), "check-config", str(out / "alertmanager.yml"))
    assert am.returncode == 0, am.stdout + am.stderr


def test_a_temporary_file_left_by_a_killed_write_is_swept_on_the_next_write(tmp_path):
    """SIGKILL cannot be caught; the next write of the same target removes what it left (after an hour)."""
    import os
    import time

    from stagewatch.safewrite import STALE_TEMP_S, safe_write

    target = tmp_path / "plan.yaml"
    target.write_text("a: 1\n")
    stale = tmp_path / ".plan.yaml.abc123.tmp"
    fresh = tmp_path / ".plan.yaml.def456.tmp"
    other = tmp_path / ".other.yaml.abc123.tmp"
    for f in (stale, fresh, other):
        f.write_text("half a write")
    old = time.time() - STALE_TEMP_S - 60
    os.utime(stale, (old, old))
    os.utime(other, (old, old))
    safe_write(target, "a: 2\n")
    assert target.read_text() == "a: 2\n"
    assert not stale.exists()  # left by a killed write of this target, an hour ago
    assert fresh.exists()  # perhaps a write in progress right now
    assert other.exists()  # another file's
