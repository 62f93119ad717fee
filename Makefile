# Set-up contract: `make demo` and `make test` from a fresh clone.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed

.PHONY: demo test venv soak bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

$(STAMP): pyproject.toml $(BIN)/python tests/plugin_example/pyproject.toml
	$(BIN)/python -m pip install --quiet -e '.[test]'
	$(BIN)/python -m pip install --quiet -e tests/plugin_example
	touch $(STAMP)

venv: $(STAMP)

demo: $(STAMP)
	$(BIN)/maskrun demo

test: $(STAMP)
	$(BIN)/python -P -m pytest -q

soak: $(STAMP)
	$(BIN)/python -P -m pytest -q -m soak

bench: $(STAMP)
	$(BIN)/python bench/recon_bench.py

clean:
	rm -rf $(VENV) runs .pytest_cache
