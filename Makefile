# calib: two commands on a fresh machine.
#   make demo   set up .venv and run the morning job on an invented scenario (embedded SQLite)
#   make test   set up .venv and run ruff, mypy and the test suite
#   make bench  run the benchmarks under bench/ (ratios against the named peers)

PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
DEV    := $(VENV)/.stamp-dev
APP    := $(VENV)/.stamp-app

.PHONY: demo test lint typecheck unit browser bench clean

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(APP): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[postgres,serve,report]'
	touch $@

$(DEV): pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e '.[dev]'
	touch $@ $(APP)

demo: $(APP)
	$(VENV)/bin/calib demo

lint: $(DEV)
	$(PY) -m ruff check calib tests bench migrations
	$(PY) -m ruff format --check calib tests bench migrations

typecheck: $(DEV)
	$(PY) -m mypy

# one test process per core (pytest-xdist): databases are per test (SQLite files, PostgreSQL
# schemas with random names), so processes never share one
unit: $(DEV)
	$(PY) -m pytest -q -n auto

test: lint typecheck unit

# the tests that drive Debian's Chromium (installed by .ci/run); screenshots in test-artefacts/
browser: $(DEV)
	$(PY) -m pytest -q tests/browser tests/workflows/test_report.py -k "browser or chromium"

bench: $(DEV)
	$(PY) -m bench

clean:
	rm -rf $(VENV) .mypy_cache .ruff_cache .pytest_cache .hypothesis test-artefacts
