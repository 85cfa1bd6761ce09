# tubetrack: two commands for a fresh machine with python3 and make.
#   make demo   demo fleet -> tubetrack.duckdb -> analyses -> reports/
#   make test   test extras + the whole test suite
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
TEST_STAMP := $(VENV)/.installed-test
DB ?= tubetrack.duckdb
TT := $(BIN)/tubetrack --db $(DB)

.PHONY: demo test bench bench-small lint clean help

help:
	@echo "make demo   - ingest sample_logs/ into $(DB), run the analyses, write reports/"
	@echo "make test   - install the test extras and run the tests"
	@echo "make bench  - benchmark suite (make bench-small for a quick run)"

$(BIN)/python:
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e .
	@touch $@

$(TEST_STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e '.[test]'
	@touch $@ $(STAMP)

demo: $(STAMP)
	$(TT) ingest --quiet sample_logs
	$(TT) status
	$(TT) tubes
	$(TT) backtest -q
	$(TT) fleet survival -q > /dev/null
	$(TT) fleet forecast --show budget
	$(TT) fleet spares -q > /dev/null
	$(TT) fleet uptime -q > /dev/null
	$(TT) fleet visits
	$(TT) report --out reports
	@echo "Reports: $$(pwd)/reports/fleet.html (per tube: reports/tubes/, images: reports/img/); they open offline"

test: $(TEST_STAMP)
	@$(BIN)/python -m pytest -q; rc=$$?; \
	  if [ $$rc -eq 5 ]; then echo "pytest: no tests collected"; rc=0; fi; exit $$rc

bench: $(STAMP)
	$(BIN)/python -m bench

bench-small: $(STAMP)
	$(BIN)/python -m bench --small

lint: $(TEST_STAMP)
	$(BIN)/ruff check tubetrack tests bench

clean:
	rm -rf $(DB) $(DB).wal reports/*.html reports/tubes reports/img reports/assets .pytest_cache
