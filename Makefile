# apportion: the two commands a newcomer needs are `make demo` and `make test`.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
export DAGSTER_HOME := $(CURDIR)/.dagster
# the weekly calendar by default (config/planning.yaml links to the same file); another: APPORTION_CONFIG=path
# (config/planning.monthly.yaml reads monthly history from its inputs.folder)
export APPORTION_CONFIG ?= config/planning.weekly.yaml
# partitions (classes) run at once: by `make demo` (cycle --parallel) and by the UI's run queue. 1 by default: on the
# 2-core demo machine 2 at once was no faster (benchmarks/README.md); raise it where cores are free
PARALLEL ?= 1

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

# The instance config: K runs at once (at most one per partition), runs whose process died detected, and
# PostgreSQL run/event storage when DAGSTER_POSTGRES_URL is set (pip install -e '.[postgres]'). Written again
# when the Makefile changes, unless you removed the first line to keep your own edits.
$(DAGSTER_HOME)/dagster.yaml: Makefile
	@mkdir -p $(DAGSTER_HOME)
	@if [ -f $@ ] && ! head -1 $@ | grep -q '^# written by make'; then echo "keeping $@ (edited by hand)"; else \
	{ echo '# written by make (Makefile, PARALLEL=$(PARALLEL)); delete this line to keep your own edits'; \
	  echo 'telemetry:'; echo '  enabled: false'; \
	  echo 'concurrency:'; echo '  runs:'; \
	  echo '    max_concurrent_runs: $(PARALLEL)'; \
	  echo '    tag_concurrency_limits:   # one run per partition at a time (the store also locks it)'; \
	  echo '      - key: dagster/partition'; echo '        value:'; echo '          applyLimitPerUniqueValue: true'; \
	  echo '        limit: 1'; \
	  echo 'run_monitoring:             # runs that never start are failed; the dead_run_reaper sensor fails runs whose process died'; \
	  echo '  enabled: true'; echo '  start_timeout_seconds: 300'; echo '  poll_interval_seconds: 60'; \
	  if [ -n "$$DAGSTER_POSTGRES_URL" ]; then \
	  echo 'storage:                    # runs, events and schedules in PostgreSQL (many partitions, many runs at once)'; \
	  echo '  postgres:'; echo '    postgres_url:'; echo '      env: DAGSTER_POSTGRES_URL'; fi; \
	} > $@; echo "wrote $@"; fi

## make demo: install, run the cycle on data/demo for every class, PARALLEL at once (and, once, the period before, so share drift has a previous cycle), with a progress display, then a summary
demo: $(VENV)/.installed-base $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/python -m pipelines cycle --config $(APPORTION_CONFIG) --backfill 1 --parallel $(PARALLEL)

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

summary: $(VENV)/.installed-base $(DAGSTER_HOME)/dagster.yaml
	$(BIN)/python -m pipelines summary --config $(APPORTION_CONFIG)

## make bench LEAVES=10000: time every stage on a synthetic hierarchy
bench: $(VENV)/.installed-base
	$(BIN)/python benchmarks/cycle.py --leaves $(or $(LEAVES),10000)

## make browser-deps: Debian's chromium for the browser test of the UI (as root; the test skips without it)
browser-deps:
	test -x /usr/bin/chromium || { apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y chromium; }

clean:
	rm -rf var .dagster
	find pipelines -name '*.nbi' -delete -o -name '*.nbc' -delete  # numba's compiled kernels (see DEVELOPERS.md, Test)
