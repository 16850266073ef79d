# The two commands a newcomer needs: `make demo` and `make test`.
# Each creates (or refreshes, when pyproject.toml changed) the virtual environment .venv;
# the demo installs only what grouplevel itself needs, the tests add their extras.

PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
BASE := $(VENV)/.grouplevel-installed
TEST := $(VENV)/.grouplevel-test-installed

.PHONY: demo test lint format clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(BASE): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install --quiet -e .
	touch $(BASE)

$(TEST): $(BASE)
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(TEST)

demo: $(BASE)
	$(BIN)/grouplevel demo --out demo_output --force

test: $(TEST)
	$(BIN)/python -m pytest -q -n auto --dist loadscope

lint: $(TEST)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

format: $(TEST)
	$(BIN)/ruff format .

clean:
	rm -rf $(VENV) demo_output build dist *.egg-info .pytest_cache
