VENV ?= .venv
PY := $(VENV)/bin/python
PIP := $(VENV)/bin/pip
DEMO_DIR ?= demo_data
RUN_DIR ?= runs/demo
FLIPS ?= dihedral

.PHONY: demo test bench wheel install install-test clean

$(VENV)/bin/python:
	python3 -m venv $(VENV)
	$(PIP) install -q --upgrade pip

$(VENV)/.installed: pyproject.toml | $(VENV)/bin/python
	$(PIP) install -q -e .
	touch $@

$(VENV)/.installed-test: $(VENV)/.installed
	$(PIP) install -q -e '.[test]'
	touch $@

install: $(VENV)/.installed

install-test: $(VENV)/.installed-test

## make demo: set up, generate the demo warehouse dataset, audit it with default settings, print where the results are
## (the one choice passed is --flips: the demo is a ceiling camera, its view has no up, down, left or right)
demo: install
	$(VENV)/bin/detdiff demo --out $(DEMO_DIR)
	$(VENV)/bin/detdiff audit $(DEMO_DIR)/annotations.json --images $(DEMO_DIR)/images --out $(RUN_DIR) --flips $(FLIPS)

## make test: install test extras and run the whole suite
test: install-test
	$(PY) -m pytest -q tests

## make bench: speed, memory and validity benchmarks (ratios measured side by side in one run)
bench: install-test
	$(PY) tests/benchmarks/run_all.py

## make wheel: build dist/detdiff-VERSION-py3-none-any.whl (configs and report assets inside) for pip install elsewhere
wheel: install-test
	rm -rf build
	$(PY) -m pip wheel --no-deps --no-build-isolation --wheel-dir dist .

clean:
	rm -rf $(DEMO_DIR) runs bench_out .pytest_cache build dist
