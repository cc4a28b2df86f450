# Two commands on a fresh machine with only python3 and make:
#   make demo   -- create .venv, install, run the whole pipeline on the invented scenario
#   make test   -- create .venv, install, run the test suite
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed-stamp
TSTAMP := $(VENV)/.installed-test-stamp

.PHONY: demo test lint bench clean

$(STAMP): pyproject.toml
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check --upgrade pip
	$(BIN)/python -m pip install --quiet --disable-pip-version-check -e ".[dev]"
	@touch $(STAMP)

demo: $(STAMP)
	@rm -rf demo-workspace
	$(BIN)/liftpool demo demo-workspace

# The tests also run the Spark engine in local mode: they install the spark extra (Java is needed;
# without it the Spark tests skip with the reason, except in CI, which installs Java).
$(TSTAMP): $(STAMP)
	$(BIN)/python -m pip install --quiet --disable-pip-version-check -e ".[dev,spark]"
	@touch $(TSTAMP)

test: $(TSTAMP)
	$(BIN)/python -m pytest

lint: $(STAMP)
	$(BIN)/ruff check liftpool data_prep models reports tests benchmarks validation

bench: $(STAMP)
	$(BIN)/python benchmarks/prep_throughput.py

clean:
	rm -rf $(VENV) demo-workspace .pytest_cache
