# Every target installs what it needs into .venv (only a Python >= 3.11 is required).
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: install test test-fast demo bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

install: $(STAMP)

## Run the whole test suite (what CI runs), one pytest worker per core.
test: $(STAMP)
	$(BIN)/python -m pytest -q -n auto tests

## Quick loop while editing: skip the slower checks.
test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -n auto -m "not slow" tests

## The demo study end to end: sweep on a local Dask cluster, table, plots.
demo: $(STAMP)
	$(BIN)/python -m leadline.jobs.demo

## Benchmarks (long timings live here, never in tests).
bench: $(STAMP)
	$(BIN)/python -m pip install --quiet -e ".[bench]"
	$(BIN)/python benchmarks/run.py

clean:
	rm -rf $(VENV) demo-output .pytest_cache
