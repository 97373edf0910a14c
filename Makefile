# Everything goes through a local virtual environment in .venv, created on first use.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: install run test browser bench lint demo clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

run: $(STAMP)
	$(BIN)/likewise run

demo: $(STAMP)
	$(BIN)/likewise demo

# Debian's chromium and chromium-driver for the console's browser test (tests/ui);
# installs them only when missing, and never fails the run (the test skips instead)
browser:
	sh scripts/browser.sh

test: $(STAMP) browser
	$(BIN)/python -m pytest $(PYTEST_ARGS)

bench: $(STAMP)
	$(BIN)/python bench/fit.py
	$(BIN)/python bench/few_batches.py
	$(BIN)/python bench/fit_latency.py
	$(BIN)/python bench/ingest.py
	$(BIN)/python bench/grouping.py
	$(BIN)/python bench/throughput.py
	$(BIN)/python bench/fit_budget.py
	$(BIN)/python bench/store_codecs.py
	$(BIN)/python bench/drift_overhead.py
	$(BIN)/python bench/drift_reference.py
	$(BIN)/python bench/grouping_runs.py

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/mypy

clean:
	rm -rf $(VENV) var .pytest_cache
