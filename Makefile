# Two set-up commands for a fresh clone: `make demo` and `make test`.
PY ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench bench-quick clean

$(STAMP): pyproject.toml
	$(PY) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[dev,distributed]"
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/stackdr demo

# Every test, the slow-marked ones too, and the docstring examples of the package.
# A quick check without the slow tests: $(BIN)/python -m pytest -m "not slow"
test: $(STAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check stackdr tests benchmarks examples
	$(BIN)/ruff format --check stackdr tests benchmarks examples

# The benchmark scripts (not the Monte Carlo studies); bench-quick at small sizes, its JSON
# files in a scratch folder.
bench: $(STAMP)
	$(BIN)/python benchmarks/run_all.py

bench-quick: $(STAMP)
	$(BIN)/python benchmarks/run_all.py --quick

clean:
	rm -rf $(VENV) build *.egg-info
