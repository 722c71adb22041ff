# Quick start: `make demo` runs the whole pipeline on the bundled demo area,
# `make test` runs the whole test suite. Each creates the virtual environment it needs.
PYTHON ?= python3
VENV ?= .venv
BIN := $(VENV)/bin

.PHONY: demo test test-fast bench clean

$(VENV)/.installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test,browser]"
	touch $@

demo: $(VENV)/.installed
	$(BIN)/geosp demo --out demo_out

# The whole suite, slow end-to-end and browser tests included. pytest's
# exit code 5 (no tests collected) is a failure here.
test: $(VENV)/.installed
	$(BIN)/python -m pytest -n 2 -q -p no:cacheprovider; rc=$$?; \
	if [ $$rc -eq 5 ]; then echo "make test: no tests were collected" >&2; exit 1; fi; exit $$rc

test-fast: $(VENV)/.installed
	$(BIN)/python -m pytest -n 2 -q -m "not slow and not browser"

bench: $(VENV)/.installed
	for f in benchmarks/bench_*.py; do echo "== $$f"; $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) demo_out .pytest_cache build *.egg-info
