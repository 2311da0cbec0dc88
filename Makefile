# Everyday commands. Each creates the virtual environment on first use.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench stress clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python fixtures/make_ferry_archive.py fixtures/ferry
	$(BIN)/corpusprep run pipelines/demo.toml --force
	$(BIN)/corpusprep inspect build/demo --show 1
	-$(BIN)/corpusprep audit build/demo --json --quiet > build/demo.audit.json
	$(BIN)/corpusprep audit build/demo --skip-ngrams --examples 3 --quiet
	$(BIN)/corpusprep report build/demo

test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check corpusprep tests bench fixtures
	$(BIN)/ruff format --check corpusprep tests bench fixtures
	$(BIN)/mypy

bench: $(STAMP)
	$(BIN)/python bench/run.py

# A folder of hostile inputs (invalid UTF-8, a 100 MB line, a gzip bomb, link loops, ...) and a run on it.
stress: $(STAMP)
	$(BIN)/python fixtures/make_hostile_inputs.py build/hostile-input
	$(BIN)/corpusprep run pipelines/stress.toml --force

clean:
	rm -rf build .pytest_cache .mypy_cache .ruff_cache
