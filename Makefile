# apportion: the two commands a newcomer needs are `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
export DAGSTER_HOME := $(CURDIR)/.dagster
export APPORTION_CONFIG ?= config/planning.yaml

.PHONY: demo test ui rebuild summary bench browser-deps clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed-base: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[test]'
	touch $@ $(VENV)/.installed-base

$(DAGSTER_HOME)/dagster.yaml:
	mkdir -p $(DAGSTER_HOME)
	printf 'telemetry:\n  enabled: false\n# one run at a time: every run writes the same DuckDB file\nconcurrency:\n  runs:\n    max_concurrent_runs: 1\n' > $@

## make demo: install, run the weekly cycle on data/demo for every class (and, once, the week before, so share drift has a previous cycle), print a summary
demo: $(VENV)/.installed-base $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/python -m pipelines cycle --config $(APPORTION_CONFIG) --backfill 1

## make test: install with test extras, lint (ruff), run the whole test suite
test: $(VENV)/.installed-test $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/ruff check .
	$(BIN)/python -m pytest

## make ui: the Dagster UI on 127.0.0.1:3000 over the same instance and store
ui: $(VENV)/.installed-base $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/dagster dev -m pipelines.definitions -h 127.0.0.1 -p 3000

## make rebuild CLASS=seasonal [ASSET=share_tables] [CYCLE=2026-11-30]: one class's asset and everything downstream, from the stored upstream tables
rebuild: $(VENV)/.installed-base $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/python -m pipelines rebuild --config $(APPORTION_CONFIG) --class $(CLASS) --from $(or $(ASSET),share_tables) $(if $(CYCLE),--cycle $(CYCLE))

summary: $(VENV)/.installed-base
	$(BIN)/python -m pipelines summary --config $(APPORTION_CONFIG)

## make bench LEAVES=10000: time every stage on a synthetic hierarchy
bench: $(VENV)/.installed-base
	$(BIN)/python benchmarks/cycle.py --leaves $(or $(LEAVES),10000)

## make browser-deps: Debian's chromium for the browser test of the UI (as root; the test skips without it)
browser-deps:
	test -x /usr/bin/chromium || { apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y chromium; }

clean:
	rm -rf var .dagster
