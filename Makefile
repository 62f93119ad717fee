# Set-up contract: `make demo` and `make test` from a fresh clone (only Python 3.11+ and make needed).
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
CORE := $(VENV)/.installed-core
# setuptools announces every editable install of a package-dir mapping with an informational
# "Editable installation" notice (not a problem in this project's packaging); keep installs quiet
PIP := PYTHONWARNINGS="ignore:Editable installation" $(BIN)/python -m pip
TEST := $(VENV)/.installed-test

.PHONY: demo test venv soak bench clean

$(BIN)/python:
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip

# the demo needs only the core dependencies
$(CORE): pyproject.toml $(BIN)/python
	$(PIP) install --quiet -e .
	touch $(CORE)

# the tests add the test extra (view, video, cluster, scikit-image) and the example camera plugin
$(TEST): $(CORE) tests/plugin_example/pyproject.toml
	$(PIP) install --quiet -e '.[test]'
	$(PIP) install --quiet -e tests/plugin_example
	touch $(TEST)

venv: $(TEST)

demo: $(CORE)
	$(BIN)/maskrun demo --acknowledge-safety

test: $(TEST)
	$(BIN)/python -P -m pytest -q

soak: $(TEST)
	$(BIN)/python -P -m pytest -q -m soak

bench: $(TEST)
	$(BIN)/python bench/recon_bench.py

clean:
	rm -rf $(VENV) runs .pytest_cache
