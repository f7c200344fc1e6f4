# sluice — the two commands a newcomer needs: `make serve` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
PORT   ?= 8000
HOST   ?= 127.0.0.1
DEMO   ?= data/demo.duckdb
ROWS   ?= 2000000
PYTEST_ARGS ?=

.PHONY: serve test demo install install-test services browser node types bench bench-replicas load fuzz clean help

help:
	@echo "make serve   build the venv and the demo data, serve on $(HOST):$(PORT) (PORT=... overrides)"
	@echo "make test    build the venv with test extras, start PostgreSQL/MariaDB if needed, run the suite"
	@echo "make demo    (re)build the demo DuckDB file ($(ROWS) rows; ROWS=... overrides)"
	@echo "make types   regenerate clients/typescript/sluice.d.ts from the OpenAPI document"
	@echo "make bench   benchmarks (not tests); make load: bounded load run; make fuzz: deep API fuzzing"

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e .
	touch $@

$(VENV)/.installed-test: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e ".[test]"
	touch $@ $(VENV)/.installed

install: $(VENV)/.installed
install-test: $(VENV)/.installed-test

$(DEMO): app/demo.py | $(VENV)/.installed
	@mkdir -p $(dir $(DEMO))
	$(BIN)/sluice demo --rows $(ROWS) --out $(DEMO)

demo: $(VENV)/.installed
	@mkdir -p $(dir $(DEMO))
	$(BIN)/sluice demo --rows $(ROWS) --out $(DEMO)

serve: $(VENV)/.installed $(DEMO)
	SLUICE_DEMO_PATH=$(DEMO) $(BIN)/sluice serve --host $(HOST) --port $(PORT)

services:
	bash .ci/services.sh

browser:  # Debian chromium + chromedriver for tests/test_browser.py, only when missing
	bash .ci/browser.sh

# JavaScript clients the tests drive (Arrow decoding in Node, tsc on the generated types)
tests/js/node_modules/.installed: tests/js/package.json tests/js/package-lock.json
	cd tests/js && npm ci --no-audit --no-fund --loglevel=error
	touch $@

node: tests/js/node_modules/.installed

# TypeScript types from the OpenAPI document (tests/test_typescript.py checks they are current)
types: $(VENV)/.installed node
	$(BIN)/python clients/typescript/generate.py

test: $(VENV)/.installed-test services browser node
	$(BIN)/python -m pytest -q -n 2 --dist loadfile $(PYTEST_ARGS)

BENCH_ROWS ?= 10000000
bench: $(VENV)/.installed-test  # benchmarks, not tests; bench/run.py says what is measured (BENCH_CASES=..., BENCH_RUNS=...)
	BENCH_ROWS=$(BENCH_ROWS) $(BIN)/python bench/run.py

bench-replicas: $(VENV)/.installed-test  # 3 replicas sharing Redis vs local caches vs 1 (redis-server)
	@command -v redis-server >/dev/null || { apt-get update -qq && apt-get install -y -qq redis-server; }
	$(BIN)/python bench/replicas.py

LOAD_CLIENTS ?= 32
LOAD_SECONDS ?= 60
load: $(VENV)/.installed-test  # bounded load run against 127.0.0.1 (server started here)
	@command -v wrk >/dev/null || { apt-get update -qq && apt-get install -y -qq wrk; }
	LOAD_CLIENTS=$(LOAD_CLIENTS) LOAD_SECONDS=$(LOAD_SECONDS) BENCH_ROWS=$(BENCH_ROWS) $(BIN)/python bench/load.py

FUZZ_SCALE ?= 8
fuzz: $(VENV)/.installed-test  # deep API fuzzing: FUZZ_SCALE x the make-test cases (8: ~19,000)
	SLUICE_FUZZ_SCALE=$(FUZZ_SCALE) $(BIN)/python -m pytest -q -n 2 --dist loadfile -p no:cacheprovider \
		tests/test_fuzz.py tests/test_fuzz_routes.py tests/test_fuzz_mutations.py $(PYTEST_ARGS)
	SLUICE_FUZZ_SCALE=$(FUZZ_SCALE) $(BIN)/python -m pytest -q -p no:cacheprovider \
		tests/test_hostile_inputs.py -k generated $(PYTEST_ARGS)

clean:
	rm -rf $(VENV) .pytest_cache .hypothesis *.egg-info tests/js/node_modules
