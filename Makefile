# The two commands a newcomer needs: `make demo` and `make test`.
# Each creates (or refreshes, when pyproject.toml changed) the virtual environment .venv.

PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.grouplevel-installed

.PHONY: demo test lint format clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/grouplevel demo --out demo_output --force

test: $(STAMP)
	$(BIN)/python -m pytest -q

lint: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

format: $(STAMP)
	$(BIN)/ruff format .

clean:
	rm -rf $(VENV) demo_output build dist *.egg-info .pytest_cache
