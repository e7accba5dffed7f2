# make test : create .venv when missing, install reportgen with its test extras, lint, type-check, test
# make demo : create .venv when missing, install, run the first example spec and print the report path
PYTHON ?= python3
VENV   ?= .venv
BIN    := $(VENV)/bin
STAMP  := $(VENV)/.installed

.PHONY: test demo lint bench clean syscheck

$(STAMP): pyproject.toml constraints.txt
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install -q --disable-pip-version-check -c constraints.txt -e '.[test]'
	touch $(STAMP)

syscheck: $(STAMP)
	@$(BIN)/python -m reportgen.syscheck

lint: syscheck
	$(BIN)/ruff check reportgen tests benchmarks
	$(BIN)/mypy

test: lint
	$(BIN)/python -m pytest -q

demo: syscheck
	$(BIN)/reportgen demo

bench: $(STAMP)
	$(BIN)/python benchmarks/run.py --write

clean:
	rm -rf $(VENV) .pytest_cache .mypy_cache .ruff_cache
