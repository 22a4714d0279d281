# Two commands for a fresh machine: `make demo` and `make test` (see README.md).
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test lint bench soak clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

demo: $(STAMP)
	$(BIN)/labseq demo

test: $(STAMP)
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -q -p no:cacheprovider

bench: $(STAMP)
	$(BIN)/python -m pytest -q -s tests/benchmarks

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache
