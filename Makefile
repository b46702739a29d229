# Two commands for a newcomer: `make demo` and `make test`. Both create .venv when it is absent.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: install demo test bench clean

$(STAMP): pyproject.toml
	test -x $(BIN)/python || $(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[dev]'
	touch $(STAMP)

install: $(STAMP)

demo: $(STAMP)
	$(BIN)/shapes demo

test: $(STAMP)
	$(BIN)/python -m pytest -q -rs

bench: $(STAMP)
	for script in bench/bench_*.py; do $(BIN)/python $$script || exit 1; done

clean:
	rm -rf runs data multirun .pytest_cache
