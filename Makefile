# Everything goes through a local virtual environment in .venv, created on first use.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp

.PHONY: install run test bench lint demo clean

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

test: $(STAMP)
	$(BIN)/python -m pytest $(PYTEST_ARGS)

bench: $(STAMP)
	$(BIN)/python bench/fit.py
	$(BIN)/python bench/few_batches.py
	$(BIN)/python bench/fit_latency.py
	$(BIN)/python bench/ingest.py
	$(BIN)/python bench/fit_budget.py
	$(BIN)/python bench/store_codecs.py
	$(BIN)/python bench/drift_overhead.py

lint: $(STAMP)
	$(BIN)/ruff check .

clean:
	rm -rf $(VENV) var .pytest_cache
