# Two commands on a fresh machine with only python3 and make:
#   make demo   -- create .venv, install, run the whole pipeline on the invented scenario
#   make test   -- create .venv, install, run the test suite
PYTHON ?= python3
VENV   := .venv
BIN    := $(VENV)/bin
VSTAMP := $(VENV)/.venv-stamp
STAMP  := $(VENV)/.installed-stamp
TSTAMP := $(VENV)/.installed-test-stamp
# The package's sources: a regular install is rebuilt when any of them changes.
SOURCES := $(shell find liftpool data_prep models reports -name '*.py' -not -path '*/__pycache__/*' 2>/dev/null)
PIP    := $(BIN)/python -m pip install --quiet --disable-pip-version-check

.PHONY: demo test lint bench clean

$(VSTAMP):
	@test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(PIP) --upgrade pip
	@touch $(VSTAMP)

# What a user runs gets a regular install (an editable one is for developers, and setuptools prints a
# note about it on every editable install); it replaces a developer's editable install, so the test
# stamp goes with it.
$(STAMP): pyproject.toml $(SOURCES) | $(VSTAMP)
	$(PIP) .
	@rm -f $(TSTAMP)
	@touch $(STAMP)

demo: $(STAMP)
	@rm -rf demo-workspace
	$(BIN)/liftpool demo demo-workspace

# The tests, lint and benchmarks use an editable install with the dev extras (the tests import the
# installed package) and the Spark engine's extra (Java is needed; without it the Spark tests skip with
# the reason, except in CI, which installs Java).
$(TSTAMP): pyproject.toml | $(VSTAMP)
	$(PIP) -e ".[dev,spark]"
	@touch $(TSTAMP)

test: $(TSTAMP)
	$(BIN)/python -m pytest --durations=15

lint: $(TSTAMP)
	$(BIN)/ruff check liftpool data_prep models reports tests benchmarks validation

bench: $(TSTAMP)
	$(BIN)/python benchmarks/prep_throughput.py

clean:
	rm -rf $(VENV) demo-workspace .pytest_cache build
