# Two commands for a fresh machine: `make demo` and `make test` (see README.md).
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test soak clean ngspice postgresql

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --upgrade pip

$(STAMP): pyproject.toml | $(BIN)/python
	$(BIN)/python -m pip install -q -e '.[test]'
	touch $(STAMP)

# The main job on the simulated bench: sweep the DC demo flyback, store it, report it; sweep the
# offline flyback (primary switch and secondary rectifier, RCD clamp) and report it; then a
# regression: the DC flyback with a mis-sized and a matched RC damper, compared.
DEMO := demo-output
demo: $(STAMP)
	@mkdir -p $(DEMO)
	$(BIN)/labseq run labseq/examples/demo_dc_flyback.toml --db $(DEMO)/labseq.sqlite --label "make demo"
	$(BIN)/labseq runs --db $(DEMO)/labseq.sqlite
	$(BIN)/labseq export latest --db $(DEMO)/labseq.sqlite --out $(DEMO)/export
	$(BIN)/labseq report latest --db $(DEMO)/labseq.sqlite --out $(DEMO)/report
	$(BIN)/labseq run labseq/examples/demo_offline_flyback.toml --db $(DEMO)/labseq.sqlite --quiet
	$(BIN)/labseq report latest --db $(DEMO)/labseq.sqlite --out $(DEMO)/offline-report
	rm -f $(DEMO)/regression.sqlite $(DEMO)/regression.sqlite-*
	$(BIN)/labseq run labseq/examples/demo_regression/baseline.toml --db $(DEMO)/regression.sqlite --quiet
	$(BIN)/labseq run labseq/examples/demo_regression/candidate.toml --db $(DEMO)/regression.sqlite --quiet
	$(BIN)/labseq compare 1 2 --db $(DEMO)/regression.sqlite --report $(DEMO)/compare
	@echo "Results in $(DEMO)/: labseq.sqlite (every raw capture), report/report.html,"
	@echo "offline-report/report.html, export/points.csv, and the regression in compare/report.html"

test: $(STAMP) ngspice postgresql
	$(BIN)/ruff check .
	$(BIN)/python -m pytest -q -p no:cacheprovider --ignore=tests/benchmarks
	$(BIN)/python -m pytest -q -s -p no:cacheprovider tests/benchmarks

# A multi-hour sweep compressed in simulated time (>= 500 points, >= 2000 captures): memory and
# per-point time must stay flat. Kept out of `make test` for its length.
soak: $(STAMP)
	$(BIN)/python -m pytest -q -s -p no:cacheprovider -m slow tests/benchmarks/soak.py

# ngspice (a Debian package) is the second reference for the nonlinear switch-node checks; where it
# cannot be installed (no root, no apt) those checks skip and say why.
ngspice:
	@command -v ngspice >/dev/null 2>&1 || { apt-get update -qq && apt-get install -y -qq ngspice >/dev/null; } \
		|| echo "ngspice could not be installed: its reference checks will skip"

# PostgreSQL (Debian's package) is the lab database that `labseq publish` writes to; the tests start
# a throwaway server from its binaries. Where it cannot be installed those tests skip and say why.
postgresql:
	@ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || command -v initdb >/dev/null 2>&1 \
		|| { apt-get update -qq && apt-get install -y -qq postgresql >/dev/null; } \
		|| echo "PostgreSQL could not be installed: the lab database tests will skip"

clean:
	rm -rf $(VENV) build *.egg-info .pytest_cache .ruff_cache
