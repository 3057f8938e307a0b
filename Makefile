# Set-up on a fresh machine: `make demo` or `make test`. Both create .venv when missing and install the
# package into it (a real, non-editable install, the way users get it).
VENV ?= .venv
PYTHON ?= python3
BIN := $(VENV)/bin
STAMP := $(VENV)/.stagewatch-installed
TEST_STAMP := $(VENV)/.stagewatch-test-extras
SOURCES := pyproject.toml $(shell find src catalog templates -type f -not -name '*.pyc' 2>/dev/null)

.PHONY: demo test install tools bench check clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)

$(STAMP): $(BIN)/python $(SOURCES)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check --upgrade pip
	$(BIN)/python -m pip install --quiet --disable-pip-version-check --force-reinstall --no-deps .
	$(BIN)/python -m pip install --quiet --disable-pip-version-check .
	touch $(STAMP)

# The tests also need the test tools and the Spark engine (PySpark is an optional extra for users).
$(TEST_STAMP): $(STAMP)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check ".[test,spark]"
	touch $(TEST_STAMP)

install: $(STAMP)

# promtool, amtool, a Prometheus server and a Java runtime for the tests (Debian packages).
tools:
	@./.ci/install-tools

demo: install
	$(BIN)/stagewatch demo -o stagewatch-demo

test: $(TEST_STAMP) tools
	$(BIN)/python -m pytest

# Static checks for contributors (not part of `make test`): pyflakes-level ruff rules and mypy.
check: install
	$(BIN)/python -m pip install --quiet --disable-pip-version-check ".[dev]"
	$(BIN)/ruff check --select F,E9 src tests benchmarks
	$(BIN)/mypy src/stagewatch

bench: $(TEST_STAMP)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check ".[bench]"
	$(BIN)/python benchmarks/bench_plan.py
	$(BIN)/python benchmarks/bench_replay.py
	$(BIN)/python benchmarks/bench_scan.py

clean:
	rm -rf $(VENV) stagewatch-demo build dist .pytest_cache
