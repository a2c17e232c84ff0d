# The two commands of the README: `make demo` and `make test`. Both set up .venv first.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test setup serve bench clean lint

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .
	$(BIN)/mypy

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test]'
	touch $(STAMP)

setup: $(STAMP)

## Set up, load the invented bookshop scenario into tidegate-demo.db and serve it on :8080.
demo: $(STAMP)
	$(BIN)/tidegate demo

## Set up, lint, type-check and run the whole test suite (CI runs exactly this).
test: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .
	$(BIN)/mypy
	$(BIN)/python -m pytest -q

serve: $(STAMP)
	$(BIN)/tidegate db upgrade
	$(BIN)/tidegate serve

bench: $(STAMP)
	$(BIN)/python bench/stats.py

clean:
	rm -rf $(VENV) *.egg-info .pytest_cache tidegate-demo.db*
