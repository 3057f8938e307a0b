from __future__ import annotations

import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

HERE = Path(__file__).resolve().parent
PIPELINES = HERE / "pipelines"


def demo_path() -> Path:
    import stagewatch.demo

    return stagewatch.demo.DEMO


def all_pipelines() -> list[Path]:
    """The bundled demo and the test scenarios (pipelines the catalog was not written against)."""
    return [demo_path(), *sorted(PIPELINES.glob("*.yaml"))]


@pytest.fixture
def write(tmp_path):
    def _write(name: str, text: str) -> Path:
        path = tmp_path / name
        path.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
        return path

    return _write


def tool(name: str) -> str:
    """The path of a real tool the tests run; `make test` installs them (.ci/install-tools)."""
    path = shutil.which(name)
    assert path, f"{name} is not installed; `make test` installs it (.ci/install-tools)"
    return path


def run_tool(*args: str, timeout: int = 600) -> subprocess.CompletedProcess:
    return subprocess.run(list(args), capture_output=True, text=True, timeout=timeout)


def stagewatch_command() -> str:
    """The installed console script next to the running interpreter."""
    candidate = Path(sys.executable).parent / "stagewatch"
    if candidate.exists():
        return str(candidate)
    found = shutil.which("stagewatch")
    assert found, "the stagewatch command is not installed"
    return found


SMALL = """
pipeline: tiny
context: business
stages:
  - id: feed
    kind: source
    modality: tabular
    output: records
    serving: batch
    volume_per_hour: 1000
    inputs:
      - {name: amount, type: numeric, range: [0, 100]}
  - id: scorer
    kind: learned
    modality: tabular
    output: score
    upstream: [feed]
    serving: online
    volume_per_hour: 1000
    latency_slo_ms: 50
"""
