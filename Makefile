# fitaudit: the two set-up commands are `make demo` and `make test`.
# Each creates or reuses .venv and installs what it needs only when pyproject.toml changed.

PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
PY     := $(BIN)/python
PYTEST_ARGS ?=
CALIBRATION_JOBS ?= 2

.PHONY: demo test test-fast bench bench-quick calibration clean help

help:
	@echo "make demo        run the weekly audit on the demo fleet (local files, embedded Prefect)"
	@echo "make test        lint (ruff) and run the test suite with the doctests"
	@echo "make test-fast   tests without the slow statistical and server checks"
	@echo "make bench       benchmarks; writes docs/performance.md"
	@echo "make bench-quick a small benchmark run"
	@echo "make calibration the size/power study; writes docs/validation.md"

$(PY):
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install --quiet --upgrade pip

$(VENV)/.installed-run: pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e .
	@touch $@

$(VENV)/.installed-test: pyproject.toml | $(PY)
	$(PY) -m pip install --quiet -e ".[test,dask]"
	@touch $@ $(VENV)/.installed-run

demo: $(VENV)/.installed-run
	$(BIN)/fitaudit demo --out fitaudit-demo

test: $(VENV)/.installed-test
	$(BIN)/ruff format --check .
	$(BIN)/ruff check .
	$(PY) -m pytest $(PYTEST_ARGS)

test-fast: $(VENV)/.installed-test
	$(BIN)/ruff format --check .
	$(BIN)/ruff check .
	$(PY) -m pytest -m "not slow and not server" $(PYTEST_ARGS)

bench: $(VENV)/.installed-test
	$(PY) -m bench

bench-quick: $(VENV)/.installed-test
	$(PY) -m bench --quick

calibration: $(VENV)/.installed-test
	$(PY) bench/calibration.py --jobs $(CALIBRATION_JOBS)

clean:
	rm -rf $(VENV) .prefect fitaudit-demo build *.egg-info .pytest_cache
