# The two set-up commands of the README: `make demo` and `make test`.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: setup test demo soak lint check clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,plots,metrics,broker,bench,parquet]'
	touch $(STAMP)

setup: $(STAMP)

## make test: set up the virtual environment and run lint, types and the whole test suite.
test: $(STAMP)
	$(BIN)/ruff check daemon simulator tests
	$(BIN)/mypy
	$(BIN)/python -m pytest

## make soak: set up, then run the reliability scenarios at full scale and print their figures
## (20 kills, 5 broker restarts, 100,000 fuzz inputs per decoder, 100,000 malformed messages,
## 60 s of overload; tens of minutes, and it prints how long it took). CI runs the same tests
## at a small scale.
soak: $(STAMP)
	$(BIN)/python -m trimtab_sim.soak --scale full

## make demo: set up and run the whole loop on the embedded default scenario.
demo: $(STAMP)
	$(BIN)/trimtab-sim demo

lint: $(STAMP)
	$(BIN)/ruff check daemon simulator tests
	$(BIN)/mypy

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache build *.egg-info
