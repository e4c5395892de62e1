# Two set-up commands (README): `make demo` runs the audit on the built-in invented demo review,
# `make test` runs the test suite. Each creates .venv and installs the project on first use.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed-stamp

.PHONY: demo test test-fast clean

demo: $(STAMP)
	$(BIN)/sced-audit demo --dir sced-audit-demo

test: $(STAMP)
	$(BIN)/python -m pytest -q

test-fast: $(STAMP)
	$(BIN)/python -m pytest -q -m "not slow and not integration"

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e '.[test,dask]'
	touch $(STAMP)

clean:
	rm -rf $(VENV) sced-audit-demo .pytest_cache
