# make test      : create .venv when missing, install reportgen with its test extras, lint,
#                  type-check, then the whole suite on every core (what CI runs)
# make test-fast : the suite without the slow and rendering tests (about a minute)
# make lint      : ruff (lint and format check) and mypy; needs no system library
# make format    : ruff format and ruff's import sorting, in place
# make demo      : run the first example spec and print the report path
# One test:        .venv/bin/python -m pytest tests/fpca/test_plan.py::test_one_part_is_the_whole_sample_exactly
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed
PYTEST := $(BIN)/python -m pytest -q -n auto --dist loadfile

.PHONY: test test-fast demo lint format bench clean syscheck kernels

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --disable-pip-version-check -c constraints.txt -e '.[test]'
	touch $(STAMP)

syscheck: $(STAMP)
	@$(BIN)/python -m reportgen.syscheck

# numba's kernels compiled once, before the test workers start (each would compile them)
kernels: $(STAMP)
	@$(BIN)/python -m reportgen.fpca.warm

lint: $(STAMP)
	$(BIN)/ruff check reportgen tests benchmarks specs
	$(BIN)/ruff format --check reportgen tests benchmarks specs
	$(BIN)/mypy

format: $(STAMP)
	$(BIN)/ruff check --select I --fix reportgen tests benchmarks specs
	$(BIN)/ruff format reportgen tests benchmarks specs

test: lint syscheck kernels
	$(PYTEST)

test-fast: kernels
	$(PYTEST) -m "not slow and not render"

demo: syscheck
	$(BIN)/reportgen demo

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py --write

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
