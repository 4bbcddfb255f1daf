# Two targets are the README's quick start: `make demo` and `make test`.
# Each creates the virtual environment on first use from pyproject.toml alone.
PYTHON ?= python3
VENV   ?= .venv
BIN     = $(VENV)/bin

.PHONY: demo test bench lint schemas clean

$(BIN)/.installed: pyproject.toml
	$(PYTHON) -c 'import sys; assert sys.version_info >= (3, 11), "turnstamp needs Python 3.11 or newer"'
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,report]'
	touch $@

demo: $(BIN)/.installed
	$(BIN)/turnstamp demo

test: $(BIN)/.installed
	$(BIN)/python -m pytest -q

bench: $(BIN)/.installed
	$(BIN)/turnstamp bench

lint: $(BIN)/.installed
	$(BIN)/python -m pip install --quiet ruff mypy
	$(BIN)/ruff check stream tests
	$(BIN)/mypy

schemas: $(BIN)/.installed
	$(BIN)/turnstamp schemas --write schemas

clean:
	rm -rf $(VENV) build *.egg-info
