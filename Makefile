# Two entry points for a fresh machine: `make demo` and `make test`.
# Both create the local virtual environment .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/pip install --quiet --upgrade pip
	$(BIN)/pip install --quiet -e '.[test,lint]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/isoscope demo --out isoscope-demo

test: $(STAMP)
	$(BIN)/python -m pytest

# the quality gates: lint rules and formatting (pyproject [tool.ruff]) and the type check of src/
lint: $(STAMP)
	$(BIN)/ruff check src tests benchmarks examples
	$(BIN)/ruff format --check src tests benchmarks examples
	$(BIN)/mypy src

bench: $(STAMP)
	$(BIN)/python benchmarks/jacobian.py
	$(BIN)/python benchmarks/theory.py
	$(BIN)/python benchmarks/analyze.py
	$(BIN)/python benchmarks/sweep.py
	$(BIN)/python benchmarks/scale.py

clean:
	rm -rf $(VENV) isoscope-demo .isoscope-demo.* isoscope-out .isoscope-out.*
