# kidneysurv: two commands for a newcomer (README, Quick start): `make demo` and `make test`.
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

export DO_NOT_TRACK := 1
export PREFECT_HOME := $(CURDIR)/.prefect
export PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS := 180
export PREFECT_SERVER_ANALYTICS_ENABLED := false
export PREFECT_LOGGING_LEVEL := WARNING
# Hypothesis profile of make test / test-fast (tests/conftest.py): "ci" runs the slowest property
# tests with fewer examples; plain pytest uses "dev" (their full counts)
export HYPOTHESIS_PROFILE ?= ci

.PHONY: setup demo lint test test-fast bench samples clean

setup: $(STAMP)

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet -c constraints.txt -e '.[dev]'
	touch $(STAMP)

demo: setup
	$(BIN)/kidneysurv demo --out out

# ruff's rules and format (pyproject.toml); .ci/run runs this before the tests
lint: setup
	$(BIN)/ruff check .
	$(BIN)/ruff format --check .

test: setup
	$(BIN)/python -m pytest -q -n 2

# without the tests marked slow (whole months, flows, killed processes): under two minutes
test-fast: setup
	$(BIN)/python -m pytest -q -n 2 -m "not slow"

# Benchmark (bench/README.md): BENCH_ROWS results, the pipeline against a one-script floor.
BENCH_ROWS ?= 1000000
bench: setup
	$(BIN)/python bench/run.py --rows $(BENCH_ROWS)

samples:
	$(PYTHON) sample_extracts/generate.py

clean:
	rm -rf out .prefect .prefect-gw* .pytest_cache .hypothesis
