# Two entry points for a fresh machine: `make demo` and `make test`.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: demo test lint typecheck unit venv clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(VENV)/.installed: pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $@

venv: $(VENV)/.installed

demo: venv
	$(BIN)/emberscore demo

lint: venv
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

typecheck: venv
	$(BIN)/mypy

unit: venv
	$(BIN)/pytest -q

test: lint typecheck unit

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
