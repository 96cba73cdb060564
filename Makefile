# calib: two commands on a fresh machine.
#   make demo   set up .venv and run the morning job on an invented scenario (embedded SQLite)
#   make test   set up .venv and run ruff, mypy and the test suite
#   make bench  run the benchmarks under bench/ (ratios against the named peers)

PYTHON ?= python3
VENV   ?= .venv
PY     := $(VENV)/bin/python
DEV    := $(VENV)/.stamp-dev
APP    := $(VENV)/.stamp-app
APP_EXTRAS := postgres,serve,report

.PHONY: demo test lint typecheck unit browser bench clean

# uv installs the same packages as pip from the same index, about five times faster (it
# downloads in parallel and links from its cache); pip when uv cannot be had
UV      := $(VENV)/bin/uv
INSTALL  = if [ -x $(UV) ]; then $(UV) pip install --quiet --python $(PY) $(1); \
	else $(PY) -m pip install --quiet $(1); fi

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -qq uv || $(PY) -m pip install --quiet --upgrade pip

$(APP): pyproject.toml | $(PY)
	$(call INSTALL,-e '.[$(APP_EXTRAS)]')
	touch $@

$(DEV): pyproject.toml | $(PY)
	$(call INSTALL,-e '.[dev]')
	touch $@ $(APP)

demo: $(APP)
	$(VENV)/bin/calib demo

lint: $(DEV)
	$(PY) -m ruff check calib tests bench migrations
	$(PY) -m ruff format --check calib tests bench migrations

typecheck: $(DEV)
	$(PY) -m mypy

# one test process per core (pytest-xdist): databases are per test (SQLite files, PostgreSQL
# schemas with random names), so processes never share one; a process that runs out of tests
# takes half of the busiest one's remaining (worksteal), so none waits at the end
unit: $(DEV)
	$(PY) -m pytest -q -n auto --dist worksteal

# lint, mypy and the tests at once (mypy's minute overlaps the tests); each one's output is
# printed whole when it ends, and any failure fails the target
test: $(DEV)
	@$(MAKE) --no-print-directory -j3 --output-sync=target lint typecheck unit

# the tests that drive Debian's Chromium (installed by .ci/run); screenshots in test-artefacts/
browser: $(DEV)
	$(PY) -m pytest -q tests/browser tests/workflows/test_report.py -k "browser or chromium"

bench: $(DEV)
	$(PY) -m bench

clean:
	rm -rf $(VENV) .mypy_cache .ruff_cache .pytest_cache .hypothesis test-artefacts
