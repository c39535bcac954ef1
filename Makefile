# keystrata: every target creates .venv on first use and installs what it needs.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
ARGS   ?=
## pytest workers for make test (pytest-xdist; "auto" is one per core, 0 runs in-process)
TEST_WORKERS ?= auto

.PHONY: all test test-fast faults bench load demo lint typecheck clean

all: test

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

## make test: the whole suite on SQLite and PostgreSQL (PostgreSQL is skipped
## locally when no server answers; with CI set, a missing server fails the run)
test: $(STAMP)
	$(BIN)/ruff check service clients tests deploy bench loadtest
	$(BIN)/ruff format --check service clients tests deploy bench loadtest
	$(BIN)/mypy
	$(BIN)/python -m pytest -m "not slow" -n $(TEST_WORKERS) --dist loadfile $(ARGS)

## make test-fast: domain and SQLite tests only, no server processes
test-fast: $(STAMP)
	$(BIN)/python -m pytest -m "not e2e" -k "not postgresql" $(ARGS)

## make faults: the long crash series (30 SIGKILLs per backend), run before resolving
## an issue that touches relaying or key delivery; KEYSTRATA_KILLS sets the number of kills.
## make test runs a short series of each, one per backend (relaying on SQLite, key
## delivery on PostgreSQL); the other halves are marked slow and run here
faults: $(STAMP)
	KEYSTRATA_KILLS=$${KEYSTRATA_KILLS:-30} $(BIN)/python -m pytest tests/e2e/test_crash.py tests/e2e/test_crash_delivery.py tests/e2e/test_faults.py $(ARGS)

## make bench: every figure beside its ceiling, measured in the same run (8-12
## minutes; not part of make test); writes bench/results.json and docs/benchmarks.md.
## ARGS='--quick' for a short smoke run, ARGS='--only ingest,relay' for some families
## (both write build/bench/results.json only)
bench: $(STAMP)
	$(BIN)/python -m bench $(ARGS)

## make load: the load test: relay and two stations as processes, stations with
## two workers on PostgreSQL, 64 SAE clients, at least 20000 keys (up to 10 minutes; not
## part of make test); ARGS='--quick' for a short run; writes build/loadtest/summary.json
load: $(STAMP)
	$(BIN)/python -m loadtest $(ARGS)

## make demo ARGS='--duration 30 --workdir /tmp/ks-demo'
demo: $(STAMP)
	$(BIN)/keystrata demo $(ARGS)

lint: $(STAMP)
	$(BIN)/ruff check service clients tests deploy bench loadtest
	$(BIN)/ruff format --check service clients tests deploy bench loadtest

typecheck: $(STAMP)
	$(BIN)/mypy

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache build *.egg-info
