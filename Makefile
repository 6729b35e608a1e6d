# The two quick-start commands: `make demo` and `make test`. Both create .venv on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin

.PHONY: demo test lint bench clean

$(BIN)/.castgrid-installed: pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $@

demo: $(BIN)/.castgrid-installed
	$(BIN)/castgrid run configs/demo.yaml

test: $(BIN)/.castgrid-installed
	$(BIN)/ruff check runner tests
	$(BIN)/python -m pytest -q -n 2

lint: $(BIN)/.castgrid-installed
	$(BIN)/ruff check runner tests

bench: $(BIN)/.castgrid-installed
	for f in tests/perf/bench_*.py; do $(BIN)/python $$f || exit 1; done

clean:
	rm -rf $(VENV) results/.cache
