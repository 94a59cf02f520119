# rim-invert: `make demo` runs the main job on the bundled demo data, `make test` runs the tests.
# Each target creates .venv with a Python >= 3.12 and installs what it needs first.
SHELL := /bin/bash
VENV := .venv
STAMP := $(VENV)/.installed

# Find a Python >= 3.12 that really runs: python3.13 / python3.12 on PATH, then pyenv's versions,
# then plain python3. A pyenv shim that is on PATH but fails is skipped because we run it.
PYTHON ?= $(shell for c in python3.13 python3.12 \
	$$(ls -d $$(pyenv root 2>/dev/null)/versions/3.1[2-9]*/bin/python3 2>/dev/null | sort -rV) python3; do \
	  if command -v $$c >/dev/null 2>&1 && $$c -c 'import sys; sys.exit(0 if sys.version_info >= (3, 12) else 1)' >/dev/null 2>&1; then \
	    echo $$c; break; fi; done)

.PHONY: demo demo-annulus test lint bench clean venv

venv: $(STAMP)

$(STAMP): pyproject.toml
	@if [ -z "$(PYTHON)" ]; then \
	  echo "rim-invert needs Python >= 3.12 and none was found (tried python3.13, python3.12, pyenv versions, python3). Install one, or run: make PYTHON=/path/to/python3.12"; \
	  exit 1; fi
	@echo "Using $(PYTHON) ($$($(PYTHON) --version))"
	$(PYTHON) -m venv $(VENV)
	$(VENV)/bin/python -m pip install --quiet --upgrade pip
	$(VENV)/bin/python -m pip install --quiet -e '.[test]'
	@touch $(STAMP)

demo: $(STAMP)
	$(VENV)/bin/rim-invert demo --out demo-output

# The wall demo (synthetic: an insulated steam line, datasets/make_annulus_demo.py), ~10 s.
demo-annulus: $(STAMP)
	$(VENV)/bin/rim-invert fit datasets/annulus_readings.csv --domain annulus --radius 0.1 \
	  --inner-radius 0.05 --conductivity 0.05 --query datasets/annulus_query.csv \
	  --unit °C --length-unit m --out demo-output-annulus

# One BLAS thread: the suite's matrices are small, and threads oversubscribe the two cores
# when dask workers or parallel tests run beside them.
test: $(STAMP)
	OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1 MKL_NUM_THREADS=1 $(VENV)/bin/python -m pytest -q tests

# Lint with the rules pyproject.toml selects (CI runs this before the tests).
lint: $(STAMP)
	$(VENV)/bin/ruff check invert tests

bench: $(STAMP)
	for b in bench/bench_*.py; do $(VENV)/bin/python $$b || exit 1; done

clean:
	rm -rf $(VENV) demo-output demo-output-annulus .pytest_cache build *.egg-info
