"""The command line: every command has help, errors are one message and an exit code, the installed command
runs the whole flow on the demo."""

from __future__ import annotations

import subprocess

import pytest

from conftest import SMALL, stagewatch_command
from stagewatch import __version__
from stagewatch.cli import main

COMMANDS = ["propose", "lint", "render", "explain", "export", "demo", "schema", "interview"]


@pytest.mark.parametrize("command", COMMANDS)
def test_help_on_every_command(command, capsys):
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    assert "usage: stagewatch " + command in capsys.readouterr().out


def test_version(capsys):
    with pytest.raises(SystemExit):
        main(["--version"])
    assert capsys.readouterr().out.strip() == f"stagewatch {__version__}"


HEAVY = ("scipy", "numpy", "networkx", "sqlglot", "duckdb", "pyspark")  # nor the data engines


@pytest.mark.parametrize("option", ["--version", "--help"])
def test_version_and_help_import_no_heavy_module(option):
    """Python's own import log (-X importtime) of a real process: start-up must not pay for the statistics."""
    import sys

    done = subprocess.run([sys.executable, "-X", "importtime", "-m", "stagewatch", option], capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    imported = {line.split("|")[-1].strip() for line in done.stderr.splitlines() if line.startswith("import time:")}
    assert "stagewatch.cli" in imported  # the log is there and names our modules
    assert not {m for m in imported if m.split(".")[0] in HEAVY}, sorted(
        m for m in imported if m.split(".")[0] in HEAVY)


def test_bad_usage_exits_2(capsys):
    with pytest.raises(SystemExit) as info:
        main(["propose"])
    assert info.value.code == 2
    assert main([]) == 2


def test_user_error_is_one_line_without_traceback(write, tmp_path, capsys):
    source = write("p.yaml", SMALL.replace("serving: online", "serving: onlin"))
    assert main(["propose", str(source), "-o", str(tmp_path / "plan.yaml")]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert f"{source}:17:" in err and "onlin" in err
    assert not (tmp_path / "plan.yaml").exists()


def test_explain_prints_the_derivation(write, tmp_path, capsys):
    out = tmp_path / "plan.yaml"
    assert main(["propose", str(write("p.yaml", SMALL)), "-o", str(out)]) == 0
    capsys.readouterr()
    assert main(["explain", str(out), "scorer.output.score_drift"]) == 0
    text = capsys.readouterr().out
    assert "noise floor" in text and "alpha" in text and "chi-square" in text
    assert main(["explain", str(out), "scorer.output.nothing"]) == 2


def test_schema_command_prints_json(capsys):
    import json

    assert main(["schema", "plan"]) == 0
    assert json.loads(capsys.readouterr().out)["title"] == "stagewatch monitoring plan"


def test_installed_command_runs_the_demo_end_to_end(tmp_path):
    command = stagewatch_command()
    out = tmp_path / "demo"
    result = subprocess.run([command, "demo", "-o", str(out)], capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stderr
    assert "lint" in result.stdout and "clean" in result.stdout
    for name in ("pipeline.yaml", "plan.yaml", "plan.md", "plan.html", "check.html", "replay.html",
                 "replay-change.html"):
        assert (out / name).exists() and str(out / name) in result.stdout
    lint = subprocess.run([command, "lint", str(out / "plan.yaml")], capture_output=True, text=True, timeout=120)
    assert lint.returncode == 0, lint.stdout
    # Running the demo again merges into the plan already there.
    again = subprocess.run([command, "demo", "-o", str(out)], capture_output=True, text=True, timeout=300)
    assert again.returncode == 0 and "already in" in again.stdout


def test_installed_package_carries_its_catalog_and_templates():
    import stagewatch
    from stagewatch.resources import data_dir

    package = __import__("pathlib").Path(stagewatch.__file__).parent
    for name in ("catalog", "templates"):
        found = data_dir(name)
        assert any(found.iterdir())
        if "site-packages" in str(package):  # a real install: the data must be inside the package
            assert found.parent == package


def test_installed_package_ships_validators_compiled_from_its_schemas():
    """The wheel carries the schemas compiled at build time (hatch_build.py), and they are the ones in use."""
    import hashlib
    import importlib

    import stagewatch
    from stagewatch.resources import SCHEMA_KINDS, compiled

    package = __import__("pathlib").Path(stagewatch.__file__).parent
    if "site-packages" not in str(package):
        pytest.skip("a source checkout compiles the schemas when first used")
    for kind in SCHEMA_KINDS:
        shipped = importlib.import_module(f"stagewatch.compiled_schemas.{kind.replace('-', '_')}")
        raw = (package / "schemas" / f"{kind}.schema.json").read_bytes()
        assert shipped.SCHEMA_SHA256 == hashlib.sha256(raw).hexdigest()
        assert compiled(kind).func is shipped.validate


def test_the_readme_example_goes_through_propose_lint_render(tmp_path):
    # The README's pipeline description, as a new user would copy it.
    from pathlib import Path

    readme = (Path(__file__).resolve().parent.parent / "README.md").read_text()
    block = readme.split("## The pipeline description", 1)[1].split("```yaml\n", 1)[1].split("```", 1)[0]
    source = tmp_path / "pipeline.yaml"
    source.write_text(block)
    plan = tmp_path / "plan.yaml"
    assert main(["propose", str(source), "-o", str(plan)]) == 0
    assert main(["lint", str(plan)]) == 0
    assert main(["render", str(plan), "-o", str(tmp_path / "review")]) == 0
    text = (tmp_path / "review" / "plan.md").read_text()
    assert "`label_scanner` → `route_classifier`" in text


def test_unwritable_output_is_a_clear_error(write, tmp_path, capsys):
    source = write("p.yaml", SMALL)
    blocker = tmp_path / "file"
    blocker.write_text("x")
    assert main(["propose", str(source), "-o", str(blocker / "plan.yaml")]) == 2
    assert main(["propose", str(source), "-o", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "cannot write here" in err and "directory" in err and "Traceback" not in err
