# Everyday commands. Each creates the virtual environment on first use.
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[dev]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/python fixtures/make_ferry_archive.py fixtures/ferry
	$(BIN)/corpusprep run pipelines/demo.toml --force

test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check corpusprep tests bench fixtures
	$(BIN)/ruff format --check corpusprep tests bench fixtures
	$(BIN)/mypy

bench: $(STAMP)
	$(BIN)/python bench/run.py

clean:
	rm -rf build .pytest_cache .mypy_cache .ruff_cache
