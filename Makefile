# geosr: set-up, tests, demo and benchmarks. Every target creates .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: test lint demo bench install clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

install: $(STAMP)

test: $(STAMP) lint
	$(BIN)/python -m pytest $(PYTEST_ARGS)

lint: $(STAMP)
	$(BIN)/ruff check geosr tests benchmarks scripts examples
	$(BIN)/mypy

demo: $(STAMP)
	$(BIN)/geosr demo demo-output

bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py

clean:
	rm -rf $(VENV) build *.egg-info demo-output
